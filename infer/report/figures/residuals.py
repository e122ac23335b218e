"""Residuals of the best-sample model per spectrum kind and frequency pair: (d − m)/σ per band against ℓ.

One panel per (kind, pair) block, in the dataset's order, with σ = sqrt(diag C); each panel quotes the
block's χ² with its own covariance block (`infer.model.fitquality`, passed as ``fit``; computed the same
way here when absent). Bands of a block are correlated, so the points are not independent: the χ² (full
block covariance) is the number to read, the points show where a misfit sits.
"""
from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.figure import Figure

from infer.model.fitquality import block_chi2, pair_labels
from infer.report.figures.style import ACCENT, INK, MIST, SHALLOW, STYLE, new_figure, save


def residuals(dataset, model, path, fit=None) -> None:
    """`residuals_figure` written to ``path`` as PNG."""
    save(residuals_figure(dataset, model, fit), path, dpi=160)


def residuals_figure(dataset, model, fit=None) -> Figure:
    """(d − m)/σ against ℓ_eff, one panel per (kind, pair); each point has gid "residuals LABEL"."""
    labels = pair_labels(dataset)
    value = np.asarray(dataset.value, float)
    model = np.asarray(model, float)
    cov = np.asarray(dataset.covariance, float)
    sigma = np.sqrt(np.diag(cov))
    ell = np.asarray(dataset.ell_eff, float)
    blocks = (fit.by_pair if fit is not None and getattr(fit, "by_pair", None)
              else block_chi2(value - model, cov, labels))
    names = list(dict.fromkeys(labels.tolist()))
    ncol = min(3, len(names))
    nrow = math.ceil(len(names) / ncol)
    with matplotlib.rc_context(STYLE):
        fig = new_figure(3.6 * ncol + 0.4, 2.3 * nrow + 0.7)
        fig.subplots_adjust(left=0.08, right=0.985, top=1 - 0.55 / (2.3 * nrow + 0.7), bottom=0.5 / (2.3 * nrow + 0.7),
                            hspace=0.55, wspace=0.25)
        for i, lab in enumerate(names):
            ax = fig.add_subplot(nrow, ncol, i + 1)
            rows = labels == lab
            res = (value[rows] - model[rows]) / sigma[rows]
            ax.axhspan(-2, 2, color=MIST, lw=0, zorder=0)
            ax.axhspan(-1, 1, color=SHALLOW, alpha=0.45, lw=0, zorder=0)
            ax.axhline(0, color=ACCENT, lw=1.0)
            ax.plot(ell[rows], res, "o", ms=2.8, color=INK, zorder=3, gid=f"residuals {lab}")
            lim = max(3.2, float(np.nanmax(np.abs(res))) * 1.15) if res.size else 3.2
            ax.set_ylim(-lim, lim)
            c2, n = blocks[lab]
            ax.set_title(f"{lab}:  χ² = {c2:.1f} / {n} bands", loc="left", fontsize=9)
            if i % ncol == 0:
                ax.set_ylabel("$\\Delta/\\sigma$")
            if i >= len(names) - ncol:
                ax.set_xlabel("multipole $\\ell$")
        fig.text(0.08, 1 - 0.12 / (2.3 * nrow + 0.7), "residuals of the best-sample model per spectrum and pair",
                 ha="left", va="top", fontsize=11, color=INK)
    return fig


__all__ = ["residuals", "residuals_figure"]
