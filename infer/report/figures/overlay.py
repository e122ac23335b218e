"""Overlay triangle plot: the marginal posteriors of several runs on one set of axes.

The smoothing and credible levels are those of the single-run triangle plot (`triangle.density_2d`,
`style.smooth`, `style.credible_levels`; highest-density 68 % and 95 % regions of the smoothed 2-D
histogram, weighted by the importance weights for a surrogate-engine sample): 1-D marginals are
smoothed histograms scaled to a peak of 1, 2-D marginals the 68 % (thicker) and 95 % (thinner)
contours. Each run has its own colour and line style (`COLOURS`, `DASHES`) so the runs stay apart in
grey print; the first run, the reference, is also shaded lightly. The axis range of each quantity covers
every run (`style.plot_range` of each, joined), cut at the prior edges of the first run that has them.
"""
from __future__ import annotations


import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import MaxNLocator

from infer.analysis.weighted import WeightedSample
from infer.report.figures.triangle import corner_grid, label_panel
from infer.report.figures.style import (ENSEMBLE_COLOURS, INK, STYLE, plot_range, save, smooth,
                                        weighted_bins)
from infer.report.figures.style import label as tex_label
from infer.report.figures.triangle import density_2d

COLOURS = ENSEMBLE_COLOURS
DASHES = ("solid", (0, (5, 2)), (0, (1.2, 1.4)), (0, (6, 2, 1.2, 2)), (0, (3, 1.5)), (0, (8, 3)))


def _draws(sample, names):
    cols = [np.asarray(sample.column(n), float).ravel() for n in names]
    ok = np.all([np.isfinite(c) for c in cols], axis=0)
    w = None
    if isinstance(sample, WeightedSample):
        w = sample.weights
        ok &= w > 0
        w = w[ok] / w[ok].sum()
    cols = [c[ok] for c in cols]
    if cols[0].size < 2:
        raise ValueError("overlay: a run needs at least two finite draws")
    return cols, w


def _joined_range(per_run, bounds):
    lo = min(r[0] for r in per_run)
    hi = max(r[1] for r in per_run)
    at_lo = bounds is not None and np.isfinite(bounds[0]) and lo <= bounds[0]
    at_hi = bounds is not None and np.isfinite(bounds[1]) and hi >= bounds[1]
    return (float(bounds[0]) if at_lo else lo, float(bounds[1]) if at_hi else hi, bool(at_lo), bool(at_hi))


def overlay_figure(runs, names) -> Figure:
    """Overlay of ``runs``, a list of (label, sample) with each sample a `Samples` after burn-in or a
    `WeightedSample`, for the quantities ``names`` (each run must have all of them)."""
    names = list(names)
    n = len(names)
    if not runs or n == 0:
        raise ValueError("overlay: nothing to draw")
    data = [_draws(s, names) for _, s in runs]
    bounds = {}
    for nm in names:
        bounds[nm] = next((s.bounds[nm] for _, s in runs if nm in s.bounds), None)
    ranges = [_joined_range([plot_range(cols[i], bounds[nm], w) for cols, w in data], bounds[nm])
              for i, nm in enumerate(names)]
    labels = [tex_label(runs[0][1], nm) for nm in names]
    size = 1.75 if n > 2 else 2.6
    fs = 13.0 if n > 3 else 10.0
    with matplotlib.rc_context(STYLE):
        fig, axes, title, left, width, height, top_in = corner_grid(
            n, size, f"Marginal posteriors of {len(runs)} runs: 68 % and 95 % credible regions, "
            "1-D marginals scaled to a peak of 1", fs)
        for i in range(n):
            for j in range(n):
                ax = axes[i, j]
                if j > i:
                    ax.set_visible(False)
                    continue
                for k, (cols, w) in enumerate(data):
                    colour, dash = COLOURS[k % len(COLOURS)], DASHES[k % len(DASHES)]
                    if i == j:
                        _curve(ax, cols[i], ranges[i], w, colour, dash, fill=k == 0)
                    else:
                        _contours(ax, cols[j], cols[i], ranges[j], ranges[i], w, colour, dash, fill=k == 0)
                ax.set_xlim(ranges[j][0], ranges[j][1])
                ax.xaxis.set_major_locator(MaxNLocator(4, prune="both"))
                if i == j:
                    ax.set_ylim(0, 1.12)
                    ax.tick_params(left=False, right=False, which="both", labelleft=False)
                else:
                    ax.set_ylim(ranges[i][0], ranges[i][1])
                    ax.yaxis.set_major_locator(MaxNLocator(4, prune="both"))
                label_panel(ax, i, j, n, labels)
        fig.text(left, 1 - 0.25 / height, title, ha="left", va="top", fontsize=fs, color=INK, linespacing=1.3)
        handles = [Line2D([], [], color=COLOURS[k % len(COLOURS)], ls=DASHES[k % len(DASHES)], lw=1.5, label=lab)
                   for k, (lab, _) in enumerate(runs)]
        if n >= 2:
            axes[0, n - 1].set_visible(False)
            fig.legend(handles=handles, loc="upper right",
                       bbox_to_anchor=(1 - 0.3 / width, 1 - (top_in + 0.05) / height),
                       fontsize=10.5 if n > 3 else 7.5, handlelength=3.2)
        else:
            axes[0, 0].legend(handles=handles, loc="upper right", fontsize=7.5, handlelength=3.2)
    return fig


def overlay(runs, names, path) -> None:
    """`overlay_figure` written to ``path`` as PNG."""
    save(overlay_figure(runs, names), path, dpi=170 if len(list(names)) <= 8 else 110)


def _curve(ax, x, rng, w, colour, dash, fill=False):
    lo, hi, el, eh = rng
    h, edges = np.histogram(x, bins=weighted_bins(x.size, w, 3.0, 20, 60), range=(lo, hi), weights=w)
    dens = smooth(h.astype(float), 1.2, [(el, eh)])
    xs = np.concatenate([[lo], 0.5 * (edges[1:] + edges[:-1]), [hi]])
    ys = np.concatenate([[dens[0] if el else 0.0], dens, [dens[-1] if eh else 0.0]])
    ys = ys / ys.max() if ys.max() > 0 else ys
    if fill:
        ax.fill_between(xs, 0, ys, color=colour, alpha=0.12, lw=0)
    ax.plot(xs, ys, color=colour, ls=dash, lw=1.4)


def _contours(ax, x, y, rx, ry, w, colour, dash, fill=False):
    xc, yc, dens, (l68, l95) = density_2d(x, y, rx, ry, w)
    top = dens.max()
    if not (top > 0 and l95 < l68 < top):     # too few distinct draws for regions: show the draws
        ax.plot(x[:2000], y[:2000], ".", ms=1, color=colour)
        return
    if fill:
        ax.contourf(xc, yc, dens.T, levels=[l95, l68, top * 1.0001], colors=[colour, colour], alpha=0.12)
        ax.contourf(xc, yc, dens.T, levels=[l68, top * 1.0001], colors=[colour], alpha=0.12)
    ax.contour(xc, yc, dens.T, levels=[l95, l68], colors=[colour, colour], linewidths=[0.8, 1.4],
               linestyles=[dash, dash])
