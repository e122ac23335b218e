"""The look of every figure of `infer`: palette, fonts, layout helpers, smoothing and credible levels.

A palette, fonts (STIX, shipped with matplotlib) and layout of our own. Figures are drawn on
`matplotlib.figure.Figure` with the Agg canvas directly and styled inside `matplotlib.rc_context`, so
importing these modules changes neither pyplot's backend nor any global rcParams.

Smoothing: histograms are smoothed with a Gaussian kernel (`scipy.ndimage`); near a prior edge the
histogram is mirrored before smoothing, so a density that piles up on the edge is not pulled down by
the kernel (the reflection method of kernel density estimation, Silverman 1986, *Density Estimation for
Statistics and Data Analysis*, §2.10). Credible regions are highest-density regions: the level is the
density at which the cells above it enclose the wanted mass (common practice).
"""
from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.mathtext import MathTextParser
from scipy.ndimage import gaussian_filter, gaussian_filter1d

from infer.analysis.marginals import effective_draws, quantile
from infer.analysis.samples import Samples

# -- look -------------------------------------------------------------------------------------------
INK = "#1d2733"           # text, axes, data points
DEEP = "#0f5c66"          # 68 % region, 1-D curves
SHALLOW = "#8cc3c0"       # 95 % region
MIST = "#dcefed"          # 1-D 68 % fill
ACCENT = "#d1603d"        # best sample, model
SAND = "#f1e7d3"          # burn-in shading
GRID = "#e4e7eb"
EMBER = "#b34a2a"          # profile likelihoods
PROFILE_FILL = "#f3d9cc"   # profile intervals
ENSEMBLE_COLOURS = ("#0f5c66", "#d1603d", "#5a4c9a", "#7d8c22", "#b0406c", "#2d6fb0", "#9b6a22", "#4b5563")

STYLE = {
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


def label(samples: Samples, name: str) -> str:
    """``$tex$`` when mathtext can draw the label, else the plain name."""
    tex = samples.label(name)
    try:
        _parser.parse(f"${tex}$")
        return f"${tex}$"
    except Exception:  # mathtext raises ValueError/ParseException subclasses
        return name


def plain(v: float, _pos=None) -> str:
    return f"{v:,.0f}" if v >= 1 else f"{v:g}"


def new_figure(w: float, h: float) -> Figure:
    fig = Figure(figsize=(w, h))
    FigureCanvasAgg(fig)
    return fig


def save(fig: Figure, path, dpi: float = 170) -> None:
    """Write ``fig`` as PNG (drawn inside the style, which is where it was built)."""
    with matplotlib.rc_context(STYLE):
        fig.savefig(path, dpi=dpi, format="png")


def render(fig: Figure, dpi: float = 100) -> np.ndarray:
    """``fig`` drawn to an RGBA array (rows, columns, 4) of uint8, as `save` would draw it."""
    with matplotlib.rc_context(STYLE):
        fig.set_dpi(dpi)
        fig.canvas.draw()
        return np.asarray(fig.canvas.buffer_rgba()).copy()


# -- smoothing and credible levels ------------------------------------------------------------------


def _pad(a: np.ndarray, axis: int, n: int, reflect_lo: bool, reflect_hi: bool) -> np.ndarray:
    """Pad ``a`` by ``n`` cells on each side of ``axis``: mirrored at a prior edge, zeros elsewhere."""
    a = np.moveaxis(a, axis, 0)
    lo = a[n - 1::-1] if reflect_lo else np.zeros((n,) + a.shape[1:])
    hi = a[:-n - 1:-1] if reflect_hi else np.zeros((n,) + a.shape[1:])
    return np.moveaxis(np.concatenate([lo, a, hi]), 0, axis)


def smooth(h: np.ndarray, sigma: float, edges: list[tuple[bool, bool]]) -> np.ndarray:
    """Gaussian smoothing of histogram ``h`` (σ in cells), mirrored at the prior edges flagged in ``edges``."""
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


def plot_range(x: np.ndarray, bounds: tuple[float, float] | None, weights=None) -> tuple[float, float, bool, bool]:
    """Axis range of draws ``x`` (optionally weighted): the 0.1–99.9 % quantiles widened by 8 %, cut at
    prior edges; the flags say which side is a prior edge."""
    lo, hi = quantile(x, [0.001, 0.999], weights)
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




def bins(n_draws: float, per_cuberoot: float, lo: int, hi: int) -> int:
    """Histogram bins growing like N^(1/3) (Freedman & Diaconis 1981, Z. Wahrsch. verw. Geb. 57, 453);
    for weighted draws N is Kish's effective number (`weighted_bins`)."""
    return int(np.clip(per_cuberoot * n_draws ** (1 / 3), lo, hi))


def weighted_bins(n_draws: int, weights, per_cuberoot: float, lo: int, hi: int) -> int:
    """`bins` for ``n_draws`` draws with normalised ``weights`` (None: equal)."""
    return bins(effective_draws(weights, n_draws) if weights is not None else n_draws, per_cuberoot, lo, hi)
