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
    """The Gaussian band-power likelihood; with ``options.low_ell = "hamimeche-lewis"`` the bands at
    ℓ ≤ ``options.low_ell_max`` use the Hamimeche–Lewis likelihood (`infer.model.lowell`) instead, as a
    block independent of the rest (the cross-covariance is ignored; a warning names its size)."""

    def __init__(self, data, options=None, where: str = "[likelihood]"):
        self.data = data
        self.kinds = tuple(data.spectra)
        self.n = len(data.value)
        self._rows = {k: np.flatnonzero(data.kind == k) for k in self.kinds}
        self._win = {k: np.ascontiguousarray(data.window[r]) for k, r in self._rows.items()}
        self._ell = np.asarray(data.window_ell)
        # The window grid is contiguous (checked by the dataset loader), so D_ℓ is sliced, not gathered.
        self._span = slice(int(self._ell[0]), int(self._ell[-1]) + 1)
        self.low = None
        self._gauss = np.arange(self.n)                 # bands of the Gaussian part
        if options is not None and options.low_ell == "hamimeche-lewis":
            self._split_low(options, where)
        self._value = np.ascontiguousarray(np.asarray(data.value, float)[self._gauss])
        cov = np.asarray(data.covariance, float)[np.ix_(self._gauss, self._gauss)]
        self._chol = np.asfortranarray(linalg.cholesky(cov, lower=True))
        # BLAS triangular solve directly: scipy.linalg.solve_triangular adds ~50 µs of checks per call.
        self._trsv = linalg.blas.get_blas_funcs("trsv", (self._chol,))
        self._lognorm = float(np.sum(np.log(np.diag(self._chol))) + 0.5 * self._gauss.size * math.log(2 * math.pi))
        if self.low is not None:
            self._lognorm += self.low.lognorm
        self.nuisance = NuisanceModel(self._rows, self._win, self._ell, self.n)

    def _split_low(self, options, where):
        import logging
        from infer.errors import UserError
        from infer.model import lowell
        rows = lowell.covered_rows(self.data, options.low_ell_max)
        if rows.size == 0:
            raise UserError(f"{where}: low_ell_max = {options.low_ell_max}: the dataset has no band at ℓ ≤ "
                            f"{options.low_ell_max} for the Hamimeche–Lewis likelihood")
        if rows.size == self.n:
            raise UserError(f"{where}: low_ell_max = {options.low_ell_max} covers every band; the Gaussian "
                            "part would be empty (lower low_ell_max)")
        self.low = lowell.HamimecheLewis(self.data, rows, where)
        self._low_rows = rows
        self._gauss = np.setdiff1d(np.arange(self.n), rows)
        rho = lowell.cross_correlation(np.asarray(self.data.covariance, float), rows)
        if rho > lowell.CROSS_WARN:
            logging.getLogger("infer").warning(
                f"{where}: the low-ℓ bands correlate with the others up to {rho:.2f}; the Hamimeche–Lewis "
                "block ignores this correlation")

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
        """−2 ln L − 2 lognorm: (d − m)ᵀ C⁻¹ (d − m), plus the Hamimeche–Lewis term of the low-ℓ bands."""
        if self.low is None:
            z = self._trsv(self._chol, self._value - model, lower=1)
            return float(z @ z)
        z = self._trsv(self._chol, self._value - model[self._gauss], lower=1)
        return float(z @ z) + self.low.chi2(model[self._low_rows])

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
        model = np.asarray(model, float)
        if self.low is None:
            return self._trsv(self._chol, self._value - model, lower=1)
        z = self._trsv(self._chol, self._value - model[self._gauss], lower=1)
        x = self.low.vector(model[self._low_rows])
        if x is None:
            return np.concatenate([z, np.full(self._low_rows.size, 1e150)])
        return np.concatenate([z, linalg.solve_triangular(self.low._chol[0], x, lower=True)])
