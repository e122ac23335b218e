"""Band powers of the data with the best-sample model, and residuals, one column per spectrum kind.

D_ℓ = value·to_dl with 1σ errors sqrt(diag C)·to_dl; residuals are (data − model)/σ per band. The χ²
quoted (total with the full band-power covariance, and per spectrum kind with its own covariance block)
are the likelihood's own (`infer.model.likelihood.FitQuality`, passed as ``fit``); only a caller without
a likelihood (a bare data set) gets them computed here the same way, rᵀ C⁻¹ r by Cholesky solve. The
model is that of the best sample (`infer.analysis.marginals.best_index`).
"""
from __future__ import annotations

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from infer.report.figures.style import ACCENT, GRID, INK, MIST, SHALLOW, STYLE, new_figure, save

def _chi2(r: np.ndarray, cov: np.ndarray) -> float:
    try:
        c = np.linalg.cholesky(cov)
        z = np.linalg.solve(c, r)
        return float(z @ z)
    except np.linalg.LinAlgError:
        return float(r @ np.linalg.lstsq(cov, r, rcond=None)[0])


def bandpowers(dataset, model, path, fit=None) -> None:
    """`bandpowers_figure` written to ``path`` as PNG."""
    save(bandpowers_figure(dataset, model, fit), path, dpi=170)


def bandpowers_figure(dataset, model, fit=None) -> Figure:
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
    chi2 = _chi2(value - model, cov) if fit is None else float(fit.chi2)
    kinds = [k for k in dataset.spectra if np.any(kind == k)]
    ncol = len(kinds)
    experiment = getattr(dataset, "experiment", "") or "data"
    with matplotlib.rc_context(STYLE):
        fig = new_figure(3.9 * ncol + 0.6, 4.9)
        fig.subplots_adjust(left=0.09 if ncol > 1 else 0.17, right=0.985, top=0.84, bottom=0.11,
                            wspace=0.28)
        gs = fig.add_gridspec(2, ncol, height_ratios=[3, 1.25], hspace=0.05)
        for c, k in enumerate(kinds):
            m = kind == k
            idx = np.flatnonzero(m)
            d, mo, s = value[m] * to_dl[m], model[m] * to_dl[m], sigma[m] * np.abs(to_dl[m])
            x = ell[m]
            chi2_k = (_chi2(value[m] - model[m], cov[np.ix_(idx, idx)]) if fit is None
                      else float(fit.by_kind[k][0]))
            ax = fig.add_subplot(gs[0, c])
            axr = fig.add_subplot(gs[1, c], sharex=ax)
            order = np.argsort(x)
            ax.axhline(0, color=GRID, lw=0.8, zorder=0)
            ax.plot(x[order], mo[order], "-", color=ACCENT, lw=1.4, zorder=2, label="best-sample model",
                    gid=f"model {k}")
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
            axr.plot(x, res, "o", ms=2.8, color=INK, zorder=3, gid=f"residuals {k}")
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
    return fig

