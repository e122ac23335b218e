"""Figures of a run: triangle plot, walker traces, convergence history and band powers.

Methods
-------
* Triangle plot. 1-D marginals are histograms (3 N^(1/3) bins, between 20 and 60, for N draws) smoothed
  with a Gaussian kernel of 1.2 bins; 2-D marginals are histograms of 2 N^(1/3) bins a side (12 to 40)
  smoothed with `scipy.ndimage.gaussian_filter` (σ = 1 bin). Near a
  prior edge the histogram is mirrored before smoothing, so a density that piles up on the edge is not
  pulled down by the kernel (the reflection method of kernel density estimation, Silverman 1986,
  *Density Estimation for Statistics and Data Analysis*, §2.10). The 68 % and 95 % credible regions are
  the highest-density regions of the smoothed 2-D histogram: the contour level is the density at which
  the cells above it enclose 68 % (95 %) of the mass (common practice).
* Convergence history. R̂ and bulk/tail ESS (Vehtari et al. 2021, Bayesian Analysis 16, 667, via
  `infer.diagnostics`) on growing prefixes of the run, discarding the first half of each prefix
  (Gelman & Rubin 1992, Statistical Science 7, 457, used the second half of each sequence).
* Band powers. χ² = rᵀ C⁻¹ r with r = data − model and the full band-power covariance C.

Look: a palette, fonts (STIX, shipped with matplotlib) and layout of our own. Figures are drawn on
`matplotlib.figure.Figure` with the Agg canvas directly and styled inside `matplotlib.rc_context`, so
importing this module changes neither pyplot's backend nor any global rcParams.
"""
from __future__ import annotations

import math
import textwrap

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.mathtext import MathTextParser
from matplotlib.patches import Patch
from matplotlib.ticker import FuncFormatter, MaxNLocator
from scipy.ndimage import gaussian_filter, gaussian_filter1d

from infer.analysis import diagnostics
from infer.analysis.samples import Samples

# -- look -------------------------------------------------------------------------------------------
INK = "#1d2733"           # text, axes, data points
DEEP = "#0f5c66"          # 68 % region, 1-D curves
SHALLOW = "#8cc3c0"       # 95 % region
MIST = "#dcefed"          # 1-D 68 % fill
ACCENT = "#d1603d"        # best sample, model
SAND = "#f1e7d3"          # burn-in shading
GRID = "#e4e7eb"
ENSEMBLE_COLOURS = ("#0f5c66", "#d1603d", "#5a4c9a", "#7d8c22", "#b0406c", "#2d6fb0", "#9b6a22", "#4b5563")

_STYLE = {
    "font.family": "serif",
    "font.serif": ["STIXGeneral", "DejaVu Serif"],
    "mathtext.fontset": "stix",
    "font.size": 9.0,
    "axes.labelsize": 10.5,
    "axes.titlesize": 10.0,
    "xtick.labelsize": 8.0,
    "ytick.labelsize": 8.0,
    "axes.edgecolor": INK,
    "axes.labelcolor": INK,
    "axes.linewidth": 0.7,
    "xtick.color": INK,
    "ytick.color": INK,
    "xtick.direction": "in",
    "ytick.direction": "in",
    "xtick.top": True,
    "ytick.right": True,
    "xtick.major.size": 3.0,
    "ytick.major.size": 3.0,
    "xtick.minor.visible": True,
    "ytick.minor.visible": True,
    "xtick.minor.size": 1.6,
    "ytick.minor.size": 1.6,
    "legend.frameon": False,
    "legend.fontsize": 8.5,
    "axes.formatter.limits": (-3, 4),
    "axes.formatter.use_mathtext": True,
    "savefig.facecolor": "white",
    "figure.facecolor": "white",
}

_parser = MathTextParser("path")


def _label(samples: Samples, name: str) -> str:
    """``$tex$`` when mathtext can draw the label, else the plain name."""
    tex = samples.label(name)
    try:
        _parser.parse(f"${tex}$")
        return f"${tex}$"
    except Exception:  # mathtext raises ValueError/ParseException subclasses
        return name


def _plain(v: float, _pos=None) -> str:
    return f"{v:,.0f}" if v >= 1 else f"{v:g}"


def _new_figure(w: float, h: float) -> Figure:
    fig = Figure(figsize=(w, h))
    FigureCanvasAgg(fig)
    return fig


def _save(fig: Figure, path, dpi: float = 170) -> None:
    fig.savefig(path, dpi=dpi, format="png")


# -- smoothing and credible levels ------------------------------------------------------------------


def _pad(a: np.ndarray, axis: int, n: int, reflect_lo: bool, reflect_hi: bool) -> np.ndarray:
    """Pad ``a`` by ``n`` cells on each side of ``axis``: mirrored at a prior edge, zeros elsewhere."""
    a = np.moveaxis(a, axis, 0)
    lo = a[n - 1::-1] if reflect_lo else np.zeros((n,) + a.shape[1:])
    hi = a[:-n - 1:-1] if reflect_hi else np.zeros((n,) + a.shape[1:])
    return np.moveaxis(np.concatenate([lo, a, hi]), 0, axis)


def _smooth(h: np.ndarray, sigma: float, edges: list[tuple[bool, bool]]) -> np.ndarray:
    n = max(1, int(math.ceil(4 * sigma)))
    n = min(n, min(h.shape))
    p = h.astype(float)
    for axis, (rl, rh) in enumerate(edges):
        p = _pad(p, axis, n, rl, rh)
    if h.ndim == 1:
        p = gaussian_filter1d(p, sigma, mode="constant")
    else:
        p = gaussian_filter(p, sigma, mode="constant")
    return p[tuple(slice(n, n + s) for s in h.shape)]


def credible_levels(density: np.ndarray, masses=(0.68, 0.95)) -> list[float]:
    """Density thresholds whose super-level sets enclose the given probability masses."""
    flat = np.sort(density.ravel())[::-1]
    cum = np.cumsum(flat)
    if cum[-1] <= 0:
        return [0.0 for _ in masses]
    cum /= cum[-1]
    return [float(flat[min(np.searchsorted(cum, m), flat.size - 1)]) for m in masses]


def _plot_range(x: np.ndarray, bounds: tuple[float, float] | None) -> tuple[float, float, bool, bool]:
    lo, hi = np.quantile(x, [0.001, 0.999])
    w = hi - lo
    if not w > 0:
        w = abs(lo) * 1e-3 or 1e-3
    lo, hi = lo - 0.08 * w, hi + 0.08 * w
    at_lo = at_hi = False
    if bounds is not None:
        blo, bhi = bounds
        if np.isfinite(blo) and lo <= blo:
            lo, at_lo = float(blo), True
        if np.isfinite(bhi) and hi >= bhi:
            hi, at_hi = float(bhi), True
    return float(lo), float(hi), at_lo, at_hi


# -- triangle ---------------------------------------------------------------------------------------


def triangle(samples_after_burn: Samples, names, path, best: dict[str, float] | None = None) -> None:
    """Triangle plot of ``names`` from the pooled draws of ``samples_after_burn`` (burn-in removed).

    Diagonal: smoothed 1-D marginal with its equal-tailed 68 % interval shaded and the median marked.
    Below: smoothed 2-D marginals with 68 % / 95 % credible regions. ``best`` ({name: value}, e.g. the
    ``best`` of each `infer.summary.Constraint`) marks the best sample when given.
    """
    s = samples_after_burn
    names = list(names)
    n = len(names)
    cols = [np.asarray(s.column(nm), float).ravel() for nm in names]
    ok = np.all([np.isfinite(c) for c in cols], axis=0)
    cols = [c[ok] for c in cols]
    if not cols or cols[0].size < 2:
        raise ValueError("triangle: need at least two finite draws")
    ranges = [_plot_range(c, s.bounds.get(nm)) for c, nm in zip(cols, names)]
    labels = [_label(s, nm) for nm in names]
    best_vals = [float(best[nm]) for nm in names] if best and all(nm in best for nm in names) else None

    size = 1.75 if n > 2 else 2.6                    # panel size, inches
    draws = cols[0].size
    shape = s.position.shape
    title = (f"Marginal posteriors from {draws:,} draws "
             f"({shape[1]} ensemble{'s' if shape[1] != 1 else ''} × {shape[2]} walkers × "
             f"{shape[0]:,} steps after burn-in)")
    fs = 13.0 if n > 3 else 10.0
    width = size * n + 0.9
    title = textwrap.fill(title, width=max(30, int((width - 0.9) * 72 / (0.48 * fs))))
    top_in = 0.25 + (title.count("\n") + 1) * fs * 1.3 / 72 + 0.2
    height = size * n + 0.7 + top_in
    with matplotlib.rc_context(_STYLE):
        fig = _new_figure(width, height)
        left = 0.75 / width
        fig.subplots_adjust(left=left, bottom=0.7 / height, right=1 - 0.15 / width, top=1 - top_in / height,
                            wspace=0.06, hspace=0.06)
        axes = fig.subplots(n, n, squeeze=False)
        for i in range(n):
            for j in range(n):
                ax = axes[i, j]
                if j > i:
                    ax.set_visible(False)
                    continue
                xlo, xhi, xl_edge, xh_edge = ranges[j]
                if i == j:
                    _diag_panel(ax, cols[i], ranges[i], best_vals[i] if best_vals else None)
                else:
                    _pair_panel(ax, cols[j], cols[i], ranges[j], ranges[i],
                                (best_vals[j], best_vals[i]) if best_vals else None)
                ax.set_xlim(xlo, xhi)
                ax.xaxis.set_major_locator(MaxNLocator(4, prune="both"))
                if i != j:
                    ax.yaxis.set_major_locator(MaxNLocator(4, prune="both"))
                if i == n - 1:
                    ax.set_xlabel(labels[j])
                    for t in ax.get_xticklabels():
                        t.set_rotation(40)
                        t.set_ha("right")
                else:
                    ax.tick_params(labelbottom=False)
                    ax.xaxis.get_offset_text().set_visible(False)
                if j == 0 and i != 0:
                    ax.set_ylabel(labels[i])
                else:
                    ax.tick_params(labelleft=False)
                    ax.yaxis.get_offset_text().set_visible(False)
                if i == j:
                    ax.tick_params(left=False, right=False, which="both", labelleft=False)
        fig.text(left, 1 - 0.25 / height, title, ha="left", va="top", fontsize=fs, color=INK,
                 linespacing=1.3)
        handles = [Patch(facecolor=DEEP, edgecolor=DEEP, label="68 % credible region"),
                   Patch(facecolor=SHALLOW, edgecolor=SHALLOW, label="95 % credible region"),
                   Patch(facecolor=MIST, edgecolor=DEEP, label="68 % equal-tailed interval (1-D)")]
        if best_vals:
            handles.append(Line2D([], [], color=ACCENT, marker="D", ms=4, lw=0, label="best sample"))
        if n >= 2:
            axes[0, n - 1].set_visible(False)
            fig.legend(handles=handles, loc="upper right", bbox_to_anchor=(1 - 0.3 / width,
                       1 - (top_in + 0.05) / height), fontsize=10.5 if n > 3 else 7.5)
        _save(fig, path, dpi=170 if n <= 8 else 110)


def _bins(n_draws: int, per_cuberoot: float, lo: int, hi: int) -> int:
    """Histogram bins growing like N^(1/3) (Freedman & Diaconis 1981, Z. Wahrsch. verw. Geb. 57, 453)."""
    return int(np.clip(per_cuberoot * n_draws ** (1 / 3), lo, hi))


def _diag_panel(ax, x, rng, best):
    lo, hi, el, eh = rng
    bins = _bins(x.size, 3.0, 20, 60)
    h, edges = np.histogram(x, bins=bins, range=(lo, hi))
    dens = _smooth(h.astype(float), 1.2, [(el, eh)])
    centres = 0.5 * (edges[1:] + edges[:-1])
    # extend the curve to the plot edges (flat at a prior edge, where the histogram was mirrored)
    xs = np.concatenate([[lo], centres, [hi]])
    ys = np.concatenate([[dens[0] if el else 0.0], dens, [dens[-1] if eh else 0.0]])
    ys = ys / ys.max() if ys.max() > 0 else ys
    q16, q50, q84 = np.quantile(x, [0.16, 0.5, 0.84])
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


def _pair_panel(ax, x, y, rx, ry, best):
    bins = _bins(x.size, 2.0, 12, 40)
    h, xe, ye = np.histogram2d(x, y, bins=bins, range=[rx[:2], ry[:2]])
    dens = _smooth(h, 1.0, [(rx[2], rx[3]), (ry[2], ry[3])])
    l68, l95 = credible_levels(dens)
    xc, yc = 0.5 * (xe[1:] + xe[:-1]), 0.5 * (ye[1:] + ye[:-1])
    # extend the grid to the plot edges so regions reach a prior edge (copy there, zero elsewhere)
    dens = np.concatenate([dens[:1] * rx[2], dens, dens[-1:] * rx[3]], axis=0)
    dens = np.concatenate([dens[:, :1] * ry[2], dens, dens[:, -1:] * ry[3]], axis=1)
    xc = np.concatenate([[rx[0]], xc, [rx[1]]])
    yc = np.concatenate([[ry[0]], yc, [ry[1]]])
    top = dens.max()
    if top > 0 and l95 < l68 < top:
        ax.contourf(xc, yc, dens.T, levels=[l95, l68, top * 1.0001], colors=[SHALLOW, DEEP], antialiased=True)
        ax.contour(xc, yc, dens.T, levels=[l95, l68], colors=[DEEP, INK], linewidths=[0.7, 0.7])
    else:  # degenerate: too few distinct draws for regions; show the draws
        ax.plot(x[:2000], y[:2000], ".", ms=1, color=DEEP)
    if best is not None:
        ax.plot([best[0]], [best[1]], marker="D", ms=4, color=ACCENT, mec="white", mew=0.5, zorder=5)
    ax.set_ylim(ry[0], ry[1])


# -- traces -----------------------------------------------------------------------------------------


def traces(samples: Samples, path, burn: int, max_walkers: int = 12, max_points: int = 1500) -> None:
    """Walker traces of the log-posterior and every sampled parameter against step.

    One colour per ensemble; at most ``max_walkers`` walkers per ensemble (evenly chosen) and about
    ``max_points`` steps per walker (every k-th step) are drawn, as the title states. The discarded
    burn-in is shaded.
    """
    steps, n_ens, n_walk, _ = samples.position.shape
    stride = max(1, int(math.ceil(steps / max_points)))
    t = np.arange(0, steps, stride)
    walkers = np.unique(np.linspace(0, n_walk - 1, min(n_walk, max_walkers)).round().astype(int))
    rows = [("log_post", "$\\ln\\,\\mathcal{P}$", samples.log_post)]
    rows += [(nm, _label(samples, nm), samples.column(nm)) for nm in samples.names]
    nrow = len(rows)
    alpha = max(0.25, min(0.8, 3.0 / len(walkers)))
    with matplotlib.rc_context(_STYLE):
        fig = _new_figure(8.2, 1.15 * nrow + 1.0)
        fig.subplots_adjust(left=0.12, right=0.98, top=1 - 0.75 / (1.15 * nrow + 1.0),
                            bottom=0.5 / (1.15 * nrow + 1.0), hspace=0.12)
        axes = fig.subplots(nrow, 1, sharex=True, squeeze=False)[:, 0]
        for ax, (name, label, vals) in zip(axes, rows):
            if burn > 0:
                ax.axvspan(0, burn, color=SAND, lw=0, zorder=0)
            v = vals[t]  # (len(t), E, W)
            for e in range(n_ens):
                colour = ENSEMBLE_COLOURS[e % len(ENSEMBLE_COLOURS)]
                seg = v[:, e, :][:, walkers]
                ax.plot(t, seg, color=colour, lw=0.45, alpha=alpha, rasterized=True)
            if burn > 0:
                ax.axvline(burn, color=INK, lw=0.7, ls=(0, (4, 2)))
            kept = vals[burn:]
            kept = kept[np.isfinite(kept)]
            if kept.size:
                # limits from the kept draws, so far-off starting points do not flatten the traces
                lo_k, hi_k = np.quantile(kept, [0.0005, 0.9995])
                span = hi_k - lo_k if hi_k > lo_k else (abs(hi_k) * 1e-3 or 1.0)
                if name == "log_post":
                    ax.set_ylim(lo_k - 1.0 * span, max(hi_k, float(kept.max())) + 0.1 * span)
                else:
                    ax.set_ylim(lo_k - 0.6 * span, hi_k + 0.6 * span)
            ax.set_ylabel(label)
            ax.yaxis.set_label_coords(-0.085, 0.5)
            ax.yaxis.set_major_locator(MaxNLocator(3))
            ax.set_xlim(0, max(steps - 1, 1))
        axes[-1].set_xlabel("step")
        shown = f"{len(walkers)} of {n_walk} walkers" if len(walkers) < n_walk else f"all {n_walk} walkers"
        every = f", one step in {stride}" if stride > 1 else ""
        fig.text(0.12, 1 - 0.12 / (1.15 * nrow + 1.0), "Walker traces", ha="left", va="top", fontsize=12,
                 color=INK)
        fig.text(0.12, 1 - 0.42 / (1.15 * nrow + 1.0),
                 f"{n_ens} ensemble{'s' if n_ens != 1 else ''} (one colour each), {shown} per ensemble{every}; "
                 f"shaded: {burn} burn-in steps discarded", ha="left", va="top", fontsize=9, color=INK)
        if n_ens > 1:
            handles = [Line2D([], [], color=ENSEMBLE_COLOURS[e % len(ENSEMBLE_COLOURS)], lw=1.5,
                              label=f"ensemble {e}") for e in range(min(n_ens, 8))]
            fig.legend(handles=handles, loc="upper right", ncol=min(n_ens, 4),
                       bbox_to_anchor=(0.98, 1 - 0.05 / (1.15 * nrow + 1.0)), fontsize=8)
        _save(fig, path, dpi=150)


# -- convergence ------------------------------------------------------------------------------------


_MIN_HISTORY_STEPS = 8


def convergence_history(samples: Samples, n_points: int = 12) -> dict[str, np.ndarray]:
    """R̂ and ESS of the sampled parameters on ``n_points`` growing prefixes of the run.

    The prefix of length L is judged on its second half (steps L//2 … L−1). Returns arrays "step"
    (L), "rhat_max" (largest R̂ over the parameters), "ess_bulk_min", "ess_tail_min" (smallest ESS);
    prefixes with fewer than 8 kept steps are left out (too short to say anything).
    """
    steps = samples.steps
    ends = np.unique(np.linspace(steps / n_points, steps, n_points).round().astype(int))
    out = {"step": [], "rhat_max": [], "ess_bulk_min": [], "ess_tail_min": []}
    names = list(samples.names)
    for end in ends:
        start = end // 2
        if end - start < _MIN_HISTORY_STEPS:
            continue
        d = diagnostics.all_diagnostics(samples.position[start:end], names)
        r = np.array([v["rhat"] for v in d.values()], float)
        b = np.array([v["ess_bulk"] for v in d.values()], float)
        t = np.array([v["ess_tail"] for v in d.values()], float)
        out["step"].append(int(end))
        out["rhat_max"].append(float(np.max(r)) if not np.all(np.isnan(r)) else math.nan)
        out["ess_bulk_min"].append(float(np.nanmin(b)) if not np.all(np.isnan(b)) else math.nan)
        out["ess_tail_min"].append(float(np.nanmin(t)) if not np.all(np.isnan(t)) else math.nan)
    hist = {k: np.asarray(v, float if k != "step" else int) for k, v in out.items()}
    hist["ensembles"] = samples.position.shape[1]
    return hist


def convergence(history: dict, path, rhat_target: float = 1.01, ess_target: float = 400.0) -> None:
    """Largest R̂ − 1 (log axis, line at the target) and smallest bulk/tail ESS against step."""
    step = np.asarray(history["step"], float)
    rhat = np.asarray(history["rhat_max"], float)
    bulk = np.asarray(history["ess_bulk_min"], float)
    tail = np.asarray(history["ess_tail_min"], float)
    with matplotlib.rc_context(_STYLE):
        fig = _new_figure(6.4, 5.2)
        fig.subplots_adjust(left=0.13, right=0.97, top=0.86, bottom=0.1, hspace=0.1)
        ax1, ax2 = fig.subplots(2, 1, sharex=True)
        excess = np.clip(rhat - 1.0, 1e-5, None)
        ok = np.isfinite(excess)
        ax1.axhspan(1e-6, rhat_target - 1.0, color=MIST, lw=0, zorder=0)
        ax1.axhline(rhat_target - 1.0, color=ACCENT, lw=1.0, ls=(0, (5, 2)))
        ax1.text(0.985, (rhat_target - 1.0) * 1.08, f"target $\\hat{{R}}$ = {rhat_target:g}",
                 transform=ax1.get_yaxis_transform(), color=ACCENT, va="bottom", ha="right", fontsize=8.5,
                 zorder=1)
        ax1.plot(step[ok], excess[ok], "-o", color=DEEP, ms=3.5, lw=1.2)
        ax1.set_yscale("log")
        top = max(float(np.nanmax(excess)) if ok.any() else 1.0, 3 * (rhat_target - 1.0))
        ax1.set_ylim(min(1e-4, float(np.nanmin(excess)) if ok.any() else 1e-4) * 0.6, top * 1.8)
        ax1.set_ylabel("largest $\\hat{R} - 1$")
        ax1.grid(True, which="major", color=GRID, lw=0.6)
        ax1.set_axisbelow(True)

        ax2.axhspan(ess_target, 1e12, color=MIST, lw=0, zorder=0)
        ax2.axhline(ess_target, color=ACCENT, lw=1.0, ls=(0, (5, 2)))
        ax2.text(0.985, ess_target * 0.97, f"target ESS = {ess_target:g}", transform=ax2.get_yaxis_transform(),
                 color=ACCENT, va="top", ha="right", fontsize=8.5, zorder=1)
        ax2.plot(step[np.isfinite(bulk)], bulk[np.isfinite(bulk)], "-o", color=DEEP, ms=3.5, lw=1.2,
                 label="bulk ESS")
        ax2.plot(step[np.isfinite(tail)], tail[np.isfinite(tail)], "-s", color="#5a4c9a", ms=3.2, lw=1.2,
                 mfc="white", label="tail ESS")
        ax2.set_yscale("log")
        ax2.yaxis.set_major_formatter(FuncFormatter(_plain))
        ax2.yaxis.set_minor_formatter(FuncFormatter(lambda v, _: _plain(v, _) if str(int(round(
            v / 10 ** math.floor(math.log10(v))))) in "25" else ""))
        vals = np.concatenate([bulk[np.isfinite(bulk)], tail[np.isfinite(tail)], [ess_target]])
        vals = vals[vals > 0]
        ax2.set_ylim(vals.min() / 1.6, vals.max() * 1.8)
        ax2.set_ylabel("smallest ESS")
        ax2.set_xlabel("steps run")
        ax2.legend(loc="upper left")
        ax2.grid(True, which="major", color=GRID, lw=0.6)
        ax2.set_axisbelow(True)
        if step.size:
            ax2.set_xlim(0, step.max() * 1.03)
        n_ens = history.get("ensembles")
        note = ""
        if n_ens == 1:
            note = " (one ensemble: R̂ tests stationarity only)"
        fig.text(0.13, 0.965, "Convergence as the run grows", ha="left", va="top", fontsize=12, color=INK)
        fig.text(0.13, 0.925, "each point: diagnostics of the second half of the run up to that step, "
                 "worst sampled parameter" + note, ha="left", va="top", fontsize=8.5, color=INK)
        _save(fig, path, dpi=170)


# -- band powers ------------------------------------------------------------------------------------


def _chi2(r: np.ndarray, cov: np.ndarray) -> float:
    try:
        c = np.linalg.cholesky(cov)
        z = np.linalg.solve(c, r)
        return float(z @ z)
    except np.linalg.LinAlgError:
        return float(r @ np.linalg.lstsq(cov, r, rcond=None)[0])


def bandpowers(dataset, model, path) -> None:
    """Data band powers with 1σ errors and the model, one column per spectrum kind, residuals below.

    D_ℓ = value·to_dl; σ = sqrt(diag C)·to_dl; residuals are (data − model)/σ per band. The title gives
    χ² with the full covariance and the number of bands; each panel gives the χ² of its own block.
    """
    kind = np.asarray(dataset.kind).astype(str)
    value = np.asarray(dataset.value, float)
    model = np.asarray(model, float)
    cov = np.asarray(dataset.covariance, float)
    to_dl = np.asarray(dataset.to_dl, float)
    ell = np.asarray(dataset.ell_eff, float)
    lo = np.asarray(dataset.ell_lo, float)
    hi = np.asarray(dataset.ell_hi, float)
    sigma = np.sqrt(np.diag(cov))
    chi2 = _chi2(value - model, cov)
    kinds = [k for k in dataset.spectra if np.any(kind == k)]
    ncol = len(kinds)
    experiment = getattr(dataset, "experiment", "") or "data"
    with matplotlib.rc_context(_STYLE):
        fig = _new_figure(3.9 * ncol + 0.6, 4.9)
        fig.subplots_adjust(left=0.09 if ncol > 1 else 0.17, right=0.985, top=0.84, bottom=0.11,
                            wspace=0.28)
        gs = fig.add_gridspec(2, ncol, height_ratios=[3, 1.25], hspace=0.05)
        for c, k in enumerate(kinds):
            m = kind == k
            idx = np.flatnonzero(m)
            d, mo, s = value[m] * to_dl[m], model[m] * to_dl[m], sigma[m] * np.abs(to_dl[m])
            x = ell[m]
            chi2_k = _chi2(value[m] - model[m], cov[np.ix_(idx, idx)])
            ax = fig.add_subplot(gs[0, c])
            axr = fig.add_subplot(gs[1, c], sharex=ax)
            order = np.argsort(x)
            ax.axhline(0, color=GRID, lw=0.8, zorder=0)
            ax.plot(x[order], mo[order], "-", color=ACCENT, lw=1.4, zorder=2, label="best-sample model")
            ax.errorbar(x, d, yerr=s, xerr=[x - lo[m], hi[m] - x], fmt="o", ms=2.8, color=INK,
                        elinewidth=0.7, capsize=0, zorder=3, label="band powers, 1σ")
            ax.set_title(f"{k}:  χ² = {chi2_k:.1f} for {m.sum()} bands", loc="left", fontsize=9.5)
            ax.tick_params(labelbottom=False)
            if c == 0:
                ax.set_ylabel("$\\mathcal{D}_\\ell$  [$\\mu$K$^2$]")
                ax.legend(loc="best", fontsize=8)
            res = (value[m] - model[m]) / sigma[m]
            axr.axhspan(-2, 2, color=MIST, lw=0, zorder=0)
            axr.axhspan(-1, 1, color=SHALLOW, alpha=0.45, lw=0, zorder=0)
            axr.axhline(0, color=ACCENT, lw=1.0)
            axr.plot(x, res, "o", ms=2.8, color=INK, zorder=3)
            lim = max(3.2, float(np.nanmax(np.abs(res))) * 1.15) if res.size else 3.2
            axr.set_ylim(-lim, lim)
            axr.set_xlabel("multipole $\\ell$")
            if c == 0:
                axr.set_ylabel("$\\Delta/\\sigma$")
            axr.yaxis.set_major_locator(MaxNLocator(5, integer=True, symmetric=True))
        fig.text(0.09 if ncol > 1 else 0.17, 0.975, f"{experiment}: band powers and best-sample model",
                 ha="left", va="top", fontsize=12, color=INK)
        fig.text(0.09 if ncol > 1 else 0.17, 0.925,
                 f"χ² = {chi2:.1f} for {value.size} bands (full covariance); "
                 "residuals in units of the diagonal error", ha="left", va="top", fontsize=9, color=INK)
        _save(fig, path, dpi=170)
