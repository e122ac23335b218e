"""The profile likelihood of one parameter, beside its marginal posterior when a chain is given.

Left panel: the profile Δχ²(ψ) at the grid points (exact fits, `infer.fit.profile`), joined by a line,
with the Δχ² = 1 and 3.84 levels and the intervals they cut (Wilks' theorem: ≈ 68.3 % and 95 %). When a
chain is given, −2 ln [p(ψ)/p_max] of the marginal posterior is drawn on the same axes: for a Gaussian
likelihood with flat priors the two curves coincide, and where they differ the marginal carries
prior-volume (projection) effects that the profile does not. Right panel (with a chain): the marginal
posterior density (smoothed histogram as in `infer.report.figures.triangle`, weights of a surrogate-engine
sample applied) with its 68 % equal-tailed interval, and the profile's Δχ² ≤ 1 interval drawn under it.
Our look (`style`, with the warm ink of `paper` for the profile).
"""
from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from infer.analysis.marginals import quantile
from infer.report.figures.paper import columns_of
from infer.report.figures.style import EMBER, PROFILE_FILL
from infer.report.figures.style import DEEP, INK, MIST, STYLE, new_figure, plot_range, save, smooth, weighted_bins


def marginal_curve(x, w, rng):
    """(grid, density normalised to peak 1) of draws ``x`` with normalised weights ``w`` over ``rng``."""
    lo, hi, el, eh = rng
    nb = weighted_bins(x.size, w, 3.0, 20, 60)
    h, edges = np.histogram(x, bins=nb, range=(lo, hi), weights=w)
    dens = smooth(h.astype(float), 1.2, [(el, eh)])
    xs = 0.5 * (edges[1:] + edges[:-1])
    return xs, dens / dens.max() if dens.max() > 0 else dens


def _signed_root_curve(x, d, per=24):
    """The curve between grid points as the intervals read it: the signed root ±√Δχ² interpolated linearly
    (`infer.fit.profile.interval`), squared back — a parabola through neighbouring points."""
    from infer.fit.profile import parabola
    centre = parabola(x, d)[0] if len(x) >= 3 else x[int(np.argmin(d))]
    s = np.sign(x - centre) * np.sqrt(np.clip(d, 0, None))
    xs = np.concatenate([np.linspace(x[i], x[i + 1], per, endpoint=False) for i in range(len(x) - 1)] + [x[-1:]])
    return xs, np.interp(xs, x, s) ** 2


def profile_figure(result, sample=None, label: str | None = None):
    """The figure of a `infer.fit.profile.ProfileResult`; ``sample``: a chain's draws (`paper.chain_draws`)."""
    name = result.param
    label = label or (f"${sample.label(name)}$" if sample is not None else name)
    grid, d = result.grid, result.dchi2
    ivs = result.intervals()
    both = sample is not None
    W, H = (7.0, 3.0) if both else (3.8, 3.0)
    with matplotlib.rc_context(STYLE):
        fig = new_figure(W, H)
        fig.subplots_adjust(left=0.6 / W, right=1 - 0.15 / W, bottom=0.55 / H, top=1 - 0.35 / H, wspace=0.22)
        axes = fig.subplots(1, 2 if both else 1, squeeze=False)[0]
        ax = axes[0]
        top = max(6.0, min(float(np.nanmax(d)) * 1.05, 12.0))
        for iv, alpha in zip(ivs, (1.0, 0.55)):
            ax.axvspan(iv.lower, iv.upper, color=PROFILE_FILL, alpha=alpha, lw=0, zorder=0)
            ax.axhline(iv.level, color=INK, alpha=1.0 if iv.level == 1 else 0.5, lw=0.6, ls=(0, (4, 2)), zorder=1)
            ax.text(grid[0], iv.level, f" Δχ² = {iv.level:g}", va="bottom", ha="left", fontsize=7.0, color=INK)
        handles = [Line2D([], [], color=EMBER, marker="o", ms=3, lw=1.2, label="profile (exact fits)")]
        if both:
            cols, w = columns_of(sample, [name])
            rng = plot_range(cols[0], sample.bounds.get(name), w)
            xs, ys = marginal_curve(cols[0], w, rng)
            with np.errstate(divide="ignore"):
                m2 = -2 * np.log(ys)
            ax.plot(xs, m2, color=DEEP, lw=1.1, ls=(0, (5, 2)), zorder=2)
            handles.append(Line2D([], [], color=DEEP, lw=1.1, ls=(0, (5, 2)), label="−2 ln (p / p_max), marginal"))
        ax.plot(*_signed_root_curve(grid, d), color=EMBER, lw=1.2, zorder=3)
        ax.plot(grid, d, color=EMBER, lw=0, marker="o", ms=3, zorder=3)
        bad = ~np.asarray(result.converged, bool)
        if bad.any():
            ax.plot(grid[bad], d[bad], ls="", marker="x", ms=5, color=INK, zorder=4)
            handles.append(Line2D([], [], ls="", marker="x", color=INK, label="fit not converged"))
        ax.set_xlim(grid[0], grid[-1])
        ax.set_ylim(0, top)
        ax.set_xlabel(label)
        ax.set_ylabel("Δχ² = −2 Δln L")
        handles += [Patch(color=PROFILE_FILL, label="Δχ² ≤ 1 and ≤ 3.84")]
        ax.legend(handles=handles, loc="upper center", fontsize=7.0)
        ax.set_title(f"Profile likelihood ({len(result.names) - 1} other parameters minimised)", fontsize=8.5,
                     loc="left")
        if both:
            bx = axes[1]
            q16, q50, q84 = quantile(cols[0], [0.16, 0.5, 0.84], w)
            m = (xs >= q16) & (xs <= q84)
            xf = np.concatenate([[q16], xs[m], [q84]])
            bx.fill_between(xf, 0, np.interp(xf, xs, ys), color=MIST, lw=0)
            bx.plot(xs, ys, color=DEEP, lw=1.3)
            iv = ivs[0]
            bx.plot([iv.lower, iv.upper], [0.05, 0.05], color=EMBER, lw=2.2, solid_capstyle="butt")
            bx.plot([result.parabola()[0]], [0.05], marker="o", ms=4, color=EMBER)
            bx.set_xlim(min(rng[0], grid[0]), max(rng[1], grid[-1]))
            bx.set_ylim(0, 1.12)
            bx.set_xlabel(label)
            bx.set_ylabel("marginal posterior (peak = 1)")
            bx.legend(handles=[Patch(facecolor=MIST, edgecolor=DEEP, label="68 % equal-tailed (marginal)"),
                               Line2D([], [], color=EMBER, lw=2.2, label="Δχ² ≤ 1 (profile)")],
                      loc="upper right", fontsize=7.0)
            bx.set_title("Marginal posterior from the chain", fontsize=8.5, loc="left")
            if not (math.isfinite(q50)):
                bx.text(0.5, 0.5, "no finite draws", transform=bx.transAxes, ha="center")
    return fig


def profile_plot(result, path, sample=None, label: str | None = None) -> None:
    """`profile_figure` written as PNG."""
    save(profile_figure(result, sample, label), path, dpi=170)
