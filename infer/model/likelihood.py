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

import numpy as np
from scipy import linalg

from infer.model.fitquality import FitQuality, fit_quality, pte as _pte  # noqa: F401 - FitQuality re-exported
from infer.model.nuisance import NUISANCE, NuisanceModel  # noqa: F401 - NUISANCE is re-exported
from infer.theory.base import Spectra


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
        return _pte(chi2, dof)

    def fit_quality(self, model: np.ndarray, n_params: int) -> FitQuality:
        """χ², its PTE for N − ``n_params`` dof, and the χ² of each spectrum kind's and each (kind, pair)
        block (`infer.model.fitquality`)."""
        model = np.asarray(model, float)
        return fit_quality(self.data, model, self.chi2(model), n_params)

    def whiten(self, model: np.ndarray) -> np.ndarray:
        """Whitened residuals r = L⁻¹ (d − m) with C = L Lᵀ, so that χ² = rᵀr (for least-squares optimisers)."""
        return self._trsv(self._chol, self.data.value - np.asarray(model, float), lower=1)
