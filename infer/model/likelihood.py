"""Gaussian band-power likelihood with the full covariance.

    model_b = c² · Σ_ℓ W_bℓ D_ℓ^{X_b}  (+ A_fg (ℓ/3000)² for TT bands, window-averaged)
    −2 ln L = (d − m)ᵀ C⁻¹ (d − m) + ln det(2π C)

with W_bℓ the bandpower window functions (Knox 1999, PRD 60, 103516; Bond, Jaffe & Knox 2000,
ApJ 533, 19), d the measured band powers and C their covariance. The Gaussian form in band powers is the
standard approximation at intermediate and high ℓ (e.g. Hamimeche & Lewis 2008, PRD 77, 103013 discuss
its limits at low ℓ: use ℓ_min ≳ 30). C is factorised once (Cholesky, C = L Lᵀ) at set-up; each call costs
one window product and one triangular solve.

Nuisance parameters (sampled when they appear under ``[parameters]``, otherwise fixed at their default):
``calibration`` — map-level calibration c (band powers scale as c², default 1);
``fg_tt_amp`` — residual unresolved-source power in TT, D_ℓ = A (ℓ/3000)² in μK² (Poisson shot noise has
C_ℓ constant, hence D_ℓ ∝ ℓ²; default 0).
"""
from __future__ import annotations

import math

import numpy as np
from scipy import linalg

from infer.theory.base import Spectra

NUISANCE = {"calibration": 1.0, "fg_tt_amp": 0.0}


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
        ell = self._ell.astype(float)
        fg = (ell / 3000.0) ** 2
        self._fg_template = np.zeros(self.n)
        if "TT" in self._rows:
            self._fg_template[self._rows["TT"]] = self._win["TT"] @ fg

    def model(self, spectra: Spectra, nuisance: dict[str, float] | None = None) -> np.ndarray:
        """Model band powers (N,) in the dataset's units."""
        nu = dict(NUISANCE, **(nuisance or {}))
        out = np.empty(self.n)
        for k, rows in self._rows.items():
            out[rows] = self._win[k] @ spectra.dl[k][self._span]
        if nu["fg_tt_amp"]:
            out += nu["fg_tt_amp"] * self._fg_template
        return out * nu["calibration"] ** 2

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
