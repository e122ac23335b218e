"""Confidence ellipses of a Gaussian approximation (a Fisher forecast): every pair of parameters.

For a Gaussian with covariance Σ the joint region of two parameters i, j holding probability p is the
ellipse (x − μ)ᵀ Σ_ij⁻¹ (x − μ) ≤ Δχ²(p), with Σ_ij the 2 × 2 block of Σ (marginalising a Gaussian keeps
the block) and Δχ² the p-quantile of a χ² with 2 degrees of freedom: 2.30 for 68.3 % ("1σ") and 6.18 for
95.4 % ("2σ") (Coe 2009, arXiv:0906.4123, common practice; quantiles from scipy.stats.chi2). The diagonal
shows each 1-D Gaussian with its ±1σ band. Drawn in the look of `infer.report.figures.style`, so a
forecast's panels read like the triangle plot of a sampled posterior (same fills for the 68/95 % regions).

With ``sample`` (the kept draws of a chain, or an importance-weighted sample) the sampled posterior is
drawn over the ellipses as outlines: its 68 %/95 % highest-density regions exactly as the triangle plot
computes them (`infer.report.figures.triangle.density_2d`) and its smoothed 1-D marginals.
"""
from __future__ import annotations


import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator
from scipy import stats

from infer.report.figures.triangle import corner_grid, label_panel
from infer.report.figures.style import ACCENT, DEEP, INK, MIST, SHALLOW, STYLE, save, smooth
from infer.report.figures.triangle import density_2d
from infer.report.figures.style import label as tex_label

#: Joint probabilities of the two regions drawn: the 1σ and 2σ masses of a 1-D Gaussian.
MASSES = (float(stats.chi2.cdf(1.0, 1)), float(stats.chi2.cdf(4.0, 1)))
#: Half-width of each axis, in marginal σ.
SPAN = 3.4


class _Labels:
    def __init__(self, tex):
        self.tex = tex or {}

    def label(self, name):
        return self.tex.get(name, name)


def ellipse(centre, cov2, mass: float, n: int = 181) -> np.ndarray:
    """(n, 2) outline of the region of probability ``mass`` of the 2-D Gaussian N(centre, cov2)."""
    radius = np.sqrt(stats.chi2.ppf(mass, 2))
    t = np.linspace(0.0, 2.0 * np.pi, n)
    chol = np.linalg.cholesky(np.asarray(cov2, float))
    return np.asarray(centre, float) + radius * (chol @ np.array([np.cos(t), np.sin(t)])).T


def ellipses(names, centre, covariance, path, tex: dict | None = None, title: str | None = None,
             sample=None) -> None:
    """`ellipses_figure` written to ``path`` as PNG."""
    save(ellipses_figure(names, centre, covariance, tex, title, sample), path,
         dpi=170 if len(list(names)) <= 8 else 110)


def _sampled(sample, names):
    """Columns and normalised weights (None: equal) of the finite draws of ``sample``, or None."""
    if sample is None:
        return None
    cols = [np.asarray(sample.column(n), float).ravel() for n in names]
    ok = np.all([np.isfinite(c) for c in cols], axis=0)
    w = getattr(sample, "weights", None)
    if w is not None and not callable(w):
        w = np.asarray(w, float).ravel()
        ok &= w > 0
        w = w[ok] / w[ok].sum()
    else:
        w = None
    return [c[ok] for c in cols], w


def ellipses_figure(names, centre, covariance, tex: dict | None = None, title: str | None = None,
                    sample=None) -> Figure:
    """Lower-triangle grid of ``names``: 68.3 %/95.4 % ellipses of every pair and the 1-D Gaussians,
    centred on ``centre`` (P,) with covariance ``covariance`` (P, P); ``tex`` LaTeX labels by name;
    ``sample`` (anything with ``column(name)``, and ``weights`` if weighted) is drawn over them."""
    names = list(names)
    n = len(names)
    mu = np.asarray(centre, float)
    cov = np.asarray(covariance, float)
    if mu.shape != (n,) or cov.shape != (n, n):
        raise ValueError(f"ellipses: need {n} centres and a {n} × {n} covariance, got {mu.shape}, {cov.shape}")
    sig = np.sqrt(np.diag(cov))
    if not np.all(np.isfinite(sig) & (sig > 0)):
        raise ValueError("ellipses: the covariance must have positive finite variances")
    labels = [tex_label(_Labels(tex), nm) for nm in names]
    drawn = _sampled(sample, names)
    ranges = [(mu[k] - SPAN * sig[k], mu[k] + SPAN * sig[k], False, False) for k in range(n)]
    size = 1.75 if n > 2 else 2.6
    title = title or "Gaussian approximation"
    fs = 12.0 if n > 3 else 9.5
    with matplotlib.rc_context(STYLE):
        fig, axes, title, left, width, height, top_in = corner_grid(n, size, title, fs, char=0.5, bottom_in=0.75)
        for i in range(n):
            for j in range(n):
                ax = axes[i, j]
                if j > i:
                    ax.set_visible(False)
                    continue
                ax.set_xlim(mu[j] - SPAN * sig[j], mu[j] + SPAN * sig[j])
                if i == j:
                    x = np.linspace(mu[i] - SPAN * sig[i], mu[i] + SPAN * sig[i], 301)
                    y = np.exp(-0.5 * ((x - mu[i]) / sig[i]) ** 2)
                    band = np.abs(x - mu[i]) <= sig[i]
                    ax.fill_between(x[band], 0, y[band], color=MIST, lw=0)
                    ax.plot(x, y, color=DEEP, lw=1.3)
                    ax.vlines(mu[i], 0, 1, color=DEEP, lw=0.8, ls=(0, (3, 2)))
                    if drawn is not None:
                        h, edges = np.histogram(drawn[0][i], bins=40, range=ranges[i][:2], weights=drawn[1])
                        d = smooth(h.astype(float), 1.2, [(False, False)])
                        if d.max() > 0:
                            ax.plot(0.5 * (edges[1:] + edges[:-1]), d / d.max(), color=ACCENT, lw=1.1)
                    ax.set_ylim(0, 1.12)
                    ax.tick_params(left=False, right=False, which="both", labelleft=False)
                else:
                    block = cov[np.ix_([j, i], [j, i])]
                    for mass, fill, edge in ((MASSES[1], SHALLOW, DEEP), (MASSES[0], DEEP, INK)):
                        e = ellipse(mu[[j, i]], block, mass)
                        ax.fill(e[:, 0], e[:, 1], color=fill, lw=0)
                        ax.plot(e[:, 0], e[:, 1], color=edge, lw=0.7)
                    if drawn is not None:
                        xc, yc, dens, (l68, l95) = density_2d(drawn[0][j], drawn[0][i], ranges[j], ranges[i],
                                                              drawn[1])
                        if dens.max() > 0 and l95 < l68 < dens.max():
                            ax.contour(xc, yc, dens.T, levels=[l95, l68], colors=[ACCENT, ACCENT],
                                       linewidths=[0.8, 1.1], linestyles=["dashed", "solid"])
                    ax.plot([mu[j]], [mu[i]], marker="+", ms=6, color=ACCENT, mew=1.0, zorder=5)
                    ax.set_ylim(mu[i] - SPAN * sig[i], mu[i] + SPAN * sig[i])
                    ax.yaxis.set_major_locator(MaxNLocator(4, prune="both"))
                ax.xaxis.set_major_locator(MaxNLocator(4, prune="both"))
                label_panel(ax, i, j, n, labels)
        fig.text(left, 1 - 0.25 / height, title, ha="left", va="top", fontsize=fs, color=INK, linespacing=1.3)
        handles = [Patch(facecolor=DEEP, edgecolor=INK, label=f"{100 * MASSES[0]:.1f} % joint region (1σ)"),
                   Patch(facecolor=SHALLOW, edgecolor=DEEP, label=f"{100 * MASSES[1]:.1f} % joint region (2σ)"),
                   Patch(facecolor=MIST, edgecolor=DEEP, label="±1σ (1-D)"),
                   Line2D([], [], color=ACCENT, marker="+", ms=6, lw=0, label="fiducial point")]
        if drawn is not None:
            handles.append(Line2D([], [], color=ACCENT, lw=1.1, label="sampled posterior, 68 % (solid) / 95 % "
                                  "(dashed);\ncentred where its noise draw puts it"))
        if n >= 2:
            fig.legend(handles=handles, loc="upper right", bbox_to_anchor=(1 - 0.3 / width, 1 - (top_in + 0.05) / height),
                       fontsize=10.0 if n > 3 else 7.0)
    return fig


__all__ = ["ellipses", "ellipses_figure", "ellipse", "MASSES"]
