"""Triangle plot: 1-D and 2-D marginal posteriors of the pooled draws after burn-in.

1-D marginals are histograms (3 N^(1/3) bins, between 20 and 60, for N draws) smoothed with a Gaussian
kernel of 1.2 bins; 2-D marginals are histograms of 2 N^(1/3) bins a side (12 to 40) smoothed with
`scipy.ndimage.gaussian_filter` (σ = 1 bin), mirrored at prior edges (`style.smooth`). The 68 % and
95 % credible regions are the highest-density regions of the smoothed 2-D histogram
(`style.credible_levels`; `density_2d` returns exactly what is contoured). The best sample (the kept
draw with the highest ln posterior, `infer.analysis.marginals.best_index`) is marked when given.

Weighted samples. Given an `infer.analysis.weighted.WeightedSample` (the surrogate engine's exact draws
with importance weights) every histogram is weighted by the normalised weights, the bin counts grow
with Kish's effective number of draws instead of the number of draws, the 1-D interval and median are
`marginals.quantile`'s weighted ones, and the credible regions enclose the stated fraction of the
*weight*; the look is the same.
"""
from __future__ import annotations

import textwrap

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator

from infer.analysis.marginals import quantile
from infer.analysis.samples import Samples
from infer.analysis.weighted import WeightedSample
from infer.report.figures.style import (ACCENT, DEEP, INK, MIST, SHALLOW, STYLE, credible_levels, new_figure,
                                        plot_range, save, smooth, weighted_bins)
from infer.report.figures.style import label as tex_label


def triangle(samples_after_burn: Samples | WeightedSample, names, path, best: dict[str, float] | None = None
             ) -> None:
    """`triangle_figure` written to ``path`` as PNG."""
    fig = triangle_figure(samples_after_burn, names, best)
    save(fig, path, dpi=170 if len(list(names)) <= 8 else 110)


def triangle_figure(samples_after_burn: Samples | WeightedSample, names, best: dict[str, float] | None = None
                    ) -> Figure:
    """Triangle plot of ``names`` from the pooled draws of ``samples_after_burn`` (burn-in removed), or
    from the weighted draws of a `WeightedSample`.

    Diagonal: smoothed 1-D marginal with its equal-tailed 68 % interval shaded and the median marked.
    Below: smoothed 2-D marginals with 68 % / 95 % credible regions. ``best`` ({name: value}, e.g. the
    ``best`` of each `infer.analysis.marginals.Constraint`) marks the best sample when given.
    """
    s = samples_after_burn
    names = list(names)
    n = len(names)
    cols = [np.asarray(s.column(nm), float).ravel() for nm in names]
    ok = np.all([np.isfinite(c) for c in cols], axis=0)
    w = None
    if isinstance(s, WeightedSample):
        w = s.weights
        ok &= w > 0
        w = w[ok] / w[ok].sum() if ok.any() else w[ok]
    cols = [c[ok] for c in cols]
    if not cols or cols[0].size < 2:
        raise ValueError("triangle: need at least two finite draws")
    ranges = [plot_range(c, s.bounds.get(nm), w) for c, nm in zip(cols, names)]
    labels = [tex_label(s, nm) for nm in names]
    best_vals = [float(best[nm]) for nm in names] if best and all(nm in best for nm in names) else None

    size = 1.75 if n > 2 else 2.6                    # panel size, inches
    draws = cols[0].size
    shape = s.position.shape
    if w is not None:
        title = (f"Marginal posteriors from {draws:,} exact draws weighted to the exact posterior "
                 f"(Kish effective sample size {1.0 / np.sum(w * w):,.0f})")
    else:
        title = (f"Marginal posteriors from {draws:,} draws "
                 f"({shape[1]} ensemble{'s' if shape[1] != 1 else ''} × {shape[2]} walkers × "
                 f"{shape[0]:,} steps after burn-in)")
    fs = 13.0 if n > 3 else 10.0
    with matplotlib.rc_context(STYLE):
        fig, axes, title, left, width, height, top_in = corner_grid(n, size, title, fs)
        for i in range(n):
            for j in range(n):
                ax = axes[i, j]
                if j > i:
                    ax.set_visible(False)
                    continue
                xlo, xhi, xl_edge, xh_edge = ranges[j]
                if i == j:
                    _diag_panel(ax, cols[i], ranges[i], best_vals[i] if best_vals else None, w)
                else:
                    _pair_panel(ax, cols[j], cols[i], ranges[j], ranges[i],
                                (best_vals[j], best_vals[i]) if best_vals else None, w)
                ax.set_xlim(xlo, xhi)
                ax.xaxis.set_major_locator(MaxNLocator(4, prune="both"))
                if i != j:
                    ax.yaxis.set_major_locator(MaxNLocator(4, prune="both"))
                label_panel(ax, i, j, n, labels)
                if i == j:
                    ax.tick_params(left=False, right=False, which="both", labelleft=False)
                    ax.yaxis.get_offset_text().set_visible(False)
        fig.text(left, 1 - 0.25 / height, title, ha="left", va="top", fontsize=fs, color=INK,
                 linespacing=1.3)
        handles = [Patch(facecolor=DEEP, edgecolor=DEEP, label="68 % credible region"),
                   Patch(facecolor=SHALLOW, edgecolor=SHALLOW, label="95 % credible region"),
                   Patch(facecolor=MIST, edgecolor=DEEP, label="68 % equal-tailed interval (1-D)")]
        if best_vals:
            handles.append(Line2D([], [], color=ACCENT, marker="D", ms=4, lw=0,
                                  label="best exact draw" if w is not None else "best sample"))
        if n >= 2:
            axes[0, n - 1].set_visible(False)
            fig.legend(handles=handles, loc="upper right", bbox_to_anchor=(1 - 0.3 / width,
                       1 - (top_in + 0.05) / height), fontsize=10.5 if n > 3 else 7.5)
    return fig


def _diag_panel(ax, x, rng, best, w=None):
    lo, hi, el, eh = rng
    nb = weighted_bins(x.size, w, 3.0, 20, 60)
    h, edges = np.histogram(x, bins=nb, range=(lo, hi), weights=w)
    dens = smooth(h.astype(float), 1.2, [(el, eh)])
    centres = 0.5 * (edges[1:] + edges[:-1])
    # extend the curve to the plot edges (flat at a prior edge, where the histogram was mirrored)
    xs = np.concatenate([[lo], centres, [hi]])
    ys = np.concatenate([[dens[0] if el else 0.0], dens, [dens[-1] if eh else 0.0]])
    ys = ys / ys.max() if ys.max() > 0 else ys
    q16, q50, q84 = quantile(x, [0.16, 0.5, 0.84], w)
    m = (xs >= q16) & (xs <= q84)
    xf = np.concatenate([[q16], xs[m], [q84]])
    yf = np.interp(xf, xs, ys)
    ax.fill_between(xf, 0, yf, color=MIST, lw=0)
    ax.plot(xs, ys, color=DEEP, lw=1.3)
    ax.vlines(q50, 0, np.interp(q50, xs, ys), color=DEEP, lw=0.8, ls=(0, (3, 2)))
    if best is not None:
        ax.plot([best], [0.035], marker="D", ms=4, color=ACCENT, clip_on=False, zorder=5)
    ax.set_ylim(0, 1.12)
    ax.grid(False)


def density_2d(x, y, rx, ry, w=None):
    """The smoothed 2-D histogram that a pair panel contours, extended to the plot edges.

    ``rx``/``ry`` are `style.plot_range` tuples; ``w`` optional normalised weights of the draws.
    Returns (x centres, y centres, density shaped (len x, len y), [68 % level, 95 % level]); the levels
    come from the grid before extension.
    """
    nb = weighted_bins(x.size, w, 2.0, 12, 40)
    h, xe, ye = np.histogram2d(x, y, bins=nb, range=[rx[:2], ry[:2]], weights=w)
    dens = smooth(h, 1.0, [(rx[2], rx[3]), (ry[2], ry[3])])
    levels = credible_levels(dens)
    xc, yc = 0.5 * (xe[1:] + xe[:-1]), 0.5 * (ye[1:] + ye[:-1])
    # extend the grid to the plot edges so regions reach a prior edge (copy there, zero elsewhere)
    dens = np.concatenate([dens[:1] * rx[2], dens, dens[-1:] * rx[3]], axis=0)
    dens = np.concatenate([dens[:, :1] * ry[2], dens, dens[:, -1:] * ry[3]], axis=1)
    xc = np.concatenate([[rx[0]], xc, [rx[1]]])
    yc = np.concatenate([[ry[0]], yc, [ry[1]]])
    return xc, yc, dens, levels


def _pair_panel(ax, x, y, rx, ry, best, w=None):
    xc, yc, dens, (l68, l95) = density_2d(x, y, rx, ry, w)
    top = dens.max()
    if top > 0 and l95 < l68 < top:
        ax.contourf(xc, yc, dens.T, levels=[l95, l68, top * 1.0001], colors=[SHALLOW, DEEP], antialiased=True)
        ax.contour(xc, yc, dens.T, levels=[l95, l68], colors=[DEEP, INK], linewidths=[0.7, 0.7])
    else:  # degenerate: too few distinct draws for regions; show the draws
        ax.plot(x[:2000], y[:2000], ".", ms=1, color=DEEP)
    if best is not None:
        ax.plot([best[0]], [best[1]], marker="D", ms=4, color=ACCENT, mec="white", mew=0.5, zorder=5)
    ax.set_ylim(ry[0], ry[1])


#: Public names of the panel painters (used by the paper figures, `infer.report.figures.paper`).
diag_panel = _diag_panel
pair_panel = _pair_panel


def label_panel(ax, i: int, j: int, n: int, labels, rotate: bool = True) -> None:
    """Axis labels and tick labels of panel (i, j) of an n × n corner grid: x labels on the bottom row
    (rotated when ``rotate``), y labels in the first column, none inside (offset texts hidden with them)."""
    if i == n - 1:
        ax.set_xlabel(labels[j])
        if rotate:
            for t in ax.get_xticklabels():
                t.set_rotation(40)
                t.set_ha("right")
    else:
        ax.tick_params(labelbottom=False)
        ax.xaxis.get_offset_text().set_visible(False)
    if j == 0 and i != 0:
        ax.set_ylabel(labels[i])
    elif i != j:
        ax.tick_params(labelleft=False)
        ax.yaxis.get_offset_text().set_visible(False)


def corner_grid(n: int, size: float, title: str, fs: float, char: float = 0.48, bottom_in: float = 0.7):
    """An n × n grid of panels of ``size`` inches under a wrapped ``title`` of font size ``fs`` (``char``:
    a character's width in units of ``fs``): (figure, axes, wrapped title, left margin as a fraction, width,
    height and title band in inches).
    Call it inside the figure's ``rc_context``."""
    width = size * n + 0.9
    title = textwrap.fill(title, width=max(30, int((width - 0.9) * 72 / (char * fs))))
    top_in = 0.25 + (title.count("\n") + 1) * fs * 1.3 / 72 + 0.2
    height = size * n + bottom_in + top_in
    fig = new_figure(width, height)
    left = 0.75 / width
    fig.subplots_adjust(left=left, bottom=bottom_in / height, right=1 - 0.15 / width, top=1 - top_in / height,
                        wspace=0.06, hspace=0.06)
    return fig, fig.subplots(n, n, squeeze=False), title, left, width, height, top_in
