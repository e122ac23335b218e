"""Gaussian band-power likelihood with the full covariance, and the fit quality (χ², PTE) it implies.

    model_b = c² · ( Σ_ℓ W_bℓ D_ℓ^{X_b} + foreground terms )          (see `infer.model.nuisance`)
    −2 ln L = (d − m)ᵀ C⁻¹ (d − m) + ln det(2π C)

with W_bℓ the bandpower window functions (Knox 1999, PRD 60, 103516; Bond, Jaffe & Knox 2000,
ApJ 533, 19), d the measured band powers and C their covariance. The Gaussian form in band powers is the
standard approximation at intermediate and high ℓ (e.g. Hamimeche & Lewis 2008, PRD 77, 103013 discuss
its limits at low ℓ: use ℓ_min ≳ 30). C is factorised once (Cholesky, C = L Lᵀ) at set-up; each call costs
one window product and one triangular solve.

χ² = (d − m)ᵀ C⁻¹ (d − m) is computed here and only here (the sampler's blob, the best-sample summary and
the band-power figure all use `chi2` or `fit_quality`); its probability to exceed for ν = N − P degrees of
freedom is the χ² survival function (scipy.stats.chi2), exact for a linear-Gaussian model and the usual
goodness-of-fit reading otherwise (common practice).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg

from infer.model.nuisance import NUISANCE, NuisanceModel  # noqa: F401 - NUISANCE is re-exported
from infer.theory.base import Spectra


@dataclass(frozen=True)
class FitQuality:
    """χ² of a model against the data: total, per spectrum kind (each block with its own covariance
    block), the degrees of freedom after ``n_params`` fitted parameters, and the PTE."""

    chi2: float
    n_bins: int
    dof: int
    pte: float
    by_kind: dict          # kind → (χ² of its block, number of bands)


class BandPowerLikelihood:
    def __init__(self, data):
        self.data = data
        self.kinds = tuple(data.spectra)
        self.n = len(data.value)
        self._rows = {k: np.flatnonzero(data.kind == k) for k in self.kinds}
        self._win = {k: np.ascontiguousarray(data.window[r]) for k, r in self._rows.items()}
        self._ell = np.asarray(data.window_ell)
        # The window grid is contiguous (checked by the dataset loader), so D_ℓ is sliced, not gathered.
        self._span = slice(int(self._ell[0]), int(self._ell[-1]) + 1)
        self._chol = np.asfortranarray(linalg.cholesky(np.asarray(data.covariance, float), lower=True))
        # BLAS triangular solve directly: scipy.linalg.solve_triangular adds ~50 µs of checks per call.
        self._trsv = linalg.blas.get_blas_funcs("trsv", (self._chol,))
        self._lognorm = float(np.sum(np.log(np.diag(self._chol))) + 0.5 * self.n * math.log(2 * math.pi))
        self.nuisance = NuisanceModel(self._rows, self._win, self._ell, self.n)

    @property
    def lognorm(self) -> float:
        """½ ln det(2π C): ln L = −χ²/2 − lognorm."""
        return self._lognorm

    def model(self, spectra: Spectra, nuisance: dict[str, float] | None = None) -> np.ndarray:
        """Model band powers (N,) in the dataset's units."""
        out = np.empty(self.n)
        for k, rows in self._rows.items():
            out[rows] = self._win[k] @ spectra.dl[k][self._span]
        return self.nuisance.apply(out, nuisance)

    def chi2(self, model: np.ndarray) -> float:
        z = self._trsv(self._chol, self.data.value - model, lower=1)
        return float(z @ z)

    def loglike(self, spectra: Spectra, nuisance: dict[str, float] | None = None) -> tuple[float, float]:
        """(ln L, χ²)."""
        c2 = self.chi2(self.model(spectra, nuisance))
        return -0.5 * c2 - self._lognorm, c2

    @staticmethod
    def pte(chi2: float, dof: int) -> float:
        """Probability to exceed χ² for ``dof`` degrees of freedom (scipy.stats.chi2 survival function)."""
        from scipy import stats
        return float(stats.chi2.sf(chi2, dof)) if dof > 0 else float("nan")

    def fit_quality(self, model: np.ndarray, n_params: int) -> FitQuality:
        """χ², its PTE for N − ``n_params`` dof, and the χ² of each spectrum kind's block."""
        model = np.asarray(model, float)
        c2 = self.chi2(model)
        cov = np.asarray(self.data.covariance, float)
        by_kind = {}
        for k, rows in self._rows.items():
            r = self.data.value[rows] - model[rows]
            block = linalg.cholesky(cov[np.ix_(rows, rows)], lower=True)
            z = linalg.solve_triangular(block, r, lower=True)
            by_kind[k] = (float(z @ z), int(len(rows)))
        dof = self.n - int(n_params)
        return FitQuality(c2, self.n, dof, self.pte(c2, dof), by_kind)

    def whiten(self, model: np.ndarray) -> np.ndarray:
        """Whitened residuals r = L⁻¹ (d − m) with C = L Lᵀ, so that χ² = rᵀr (for least-squares optimisers)."""
        return self._trsv(self._chol, self.data.value - np.asarray(model, float), lower=1)
