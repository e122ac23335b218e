"""Gaussian band-power likelihood with the full covariance, and the fit quality (χ², PTE) it implies.

    model_b = s_b(θ) · ( Σ_ℓ W_bℓ D_ℓ^{X_b} + foreground terms )      (see `infer.model.nuisance`)
    −2 ln L = (d − m)ᵀ C⁻¹ (d − m) + ln det(2π C)

with W_bℓ the bandpower window functions (Knox 1999, PRD 60, 103516; Bond, Jaffe & Knox 2000,
ApJ 533, 19), d the measured band powers and C their covariance. The Gaussian form in band powers is the
standard approximation at intermediate and high ℓ (e.g. Hamimeche & Lewis 2008, PRD 77, 103013 discuss
its limits at low ℓ: use ℓ_min ≳ 30). C is factorised once (Cholesky, C = L Lᵀ) at set-up; each call costs
one window product and one triangular solve.

Nuisance parameters marked ``analytic = true`` in the run file are integrated out in closed form
(`infer.model.marginal`, Bridle et al. 2002): C becomes C + T Σ Tᵀ, applied through the Woodbury identity,
and the χ² of a point is then the χ² against that marginal covariance.

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
from infer.model.marginal import AnalyticMarginal, whiten_columns
from infer.model.nuisance import NUISANCE, NuisanceModel, Values  # noqa: F401 - NUISANCE is re-exported
from infer.theory.base import Spectra


class BandPowerLikelihood:
    """The Gaussian band-power likelihood; with ``options.low_ell = "hamimeche-lewis"`` the bands at
    ℓ ≤ ``options.low_ell_max`` use the Hamimeche–Lewis likelihood (`infer.model.lowell`) instead, as a
    block independent of the rest (the cross-covariance is ignored; a warning names its size)."""

    def __init__(self, data, options=None, where: str = "[likelihood]", nuisance=None,
                 analytic: AnalyticMarginal | None = None):
        self.data = data
        self.kinds = tuple(data.spectra)
        self.n = len(data.value)
        self._rows = {k: np.flatnonzero(data.kind == k) for k in self.kinds}
        from scipy import sparse
        # Windows are banded: sparse products cost O(non-zeros), not O(N × L).
        self._win = {k: sparse.csr_matrix(np.asarray(data.window[r], float)) for k, r in self._rows.items()}
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
        self.nuisance = NuisanceModel(data, sparse.csr_matrix(np.asarray(data.window, float)), self._ell,
                                      nuisance, where.replace("[likelihood]", "[nuisance]"))
        self.marginal = analytic if analytic is not None and analytic.k else None
        self._marg_cache = (None, None)
        if self.marginal is not None:
            self._check_marginal(where)

    def _check_marginal(self, where):
        from infer.errors import UserError
        names, nu = self.marginal.names, self.nuisance
        for name in names:
            if name not in nu.linear:
                why = "not a nuisance parameter of this dataset" if name not in nu.defaults else \
                    "it enters the model non-linearly"
                raise UserError(f"{where}: [parameters.{name}] analytic = true: {why} (linear ones: "
                                f"{', '.join(sorted(nu.linear)) or 'none'})")
        beams = [n for n in names if n in nu.instrument.beams]
        if beams and len(beams) < len(names):
            raise UserError(f"{where}: analytic = true on beam modes ({', '.join(beams)}) and foreground "
                            "amplitudes together: their product enters the model, so the integral is not "
                            "Gaussian; marginalise one kind analytically and sample the other")
        if self.low is not None:
            raise UserError(f"{where}: analytic = true does not combine with low_ell = \"hamimeche-lewis\" "
                            "(the low-ℓ block is not Gaussian in the band powers)")

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

    def binned(self, spectra: Spectra) -> np.ndarray:
        """The binned theory B (N,): each band's window applied to its kind's D_ℓ (no nuisance terms)."""
        out = np.empty(self.n)
        for k, rows in self._rows.items():
            out[rows] = self._win[k] @ spectra.dl[k][self._span]
        return out

    def _values(self, nuisance, n=None):
        given = dict(nuisance or {})
        if self.marginal is not None:
            given.update(zip(self.marginal.names, self.marginal.mean))
        return self.nuisance.values(given, n)

    def model_many(self, B: np.ndarray, nuisance: dict | None = None) -> np.ndarray:
        """Model bands m (n, N) from binned theory B (n, N); analytic parameters at their prior means."""
        B = np.atleast_2d(B)
        return self.nuisance.apply_many(B, self._values(nuisance, len(B)))

    def _columns(self, B, v):
        """Whitened columns U = L⁻¹T (n, N, K) of the analytic parameters.

        Foreground amplitudes: T = g ⊙ t with g the gains (calibration × polarisation efficiency), constant
        on each (kind, pair) block, and t the beam-scaled templates; so U = Σ_blocks g_block · L⁻¹(t|block),
        whose block columns are whitened once for each value of the shape, SED and beam parameters — the
        per-point cost is then a sum, not a triangular solve, even with sampled calibrations."""
        nu, names = self.nuisance, self.marginal.names
        if any(n in nu.instrument.beams for n in names):          # columns depend on the theory B
            return whiten_columns(self._chol, nu.columns(B, v, names))
        shape_names = [k for k in (*nu.ranges, *nu.instrument.beams) if k in v]
        if any(np.any(v[k] != v[k][0]) for k in shape_names):     # shapes differ between rows
            return whiten_columns(self._chol, nu.columns(B, v, names))
        key = tuple(float(v[k][0]) for k in shape_names)
        if self._marg_cache[0] != key:
            from infer.model.instrument import CALIBRATION
            ones = set(nu.instrument.cal) | set(nu.instrument.poleff) | {CALIBRATION}
            v1 = Values({k: (np.ones(1) if k in ones else np.asarray(v[k][:1])) for k in v})
            v1.given = getattr(v, "given", frozenset(v))
            t = nu.columns(np.atleast_2d(B)[:1], v1, names)[0]                        # (N, K)
            blocks = self._blocks()
            masked = np.stack([t * np.isin(np.arange(self.n), rows)[:, None] for rows in blocks])
            U0 = np.moveaxis(whiten_columns(self._chol, np.moveaxis(masked, 0, 2).reshape(1, self.n, -1))[0]
                             .reshape(self.n, len(names), len(blocks)), 2, 0)        # (blocks, N, K)
            self._marg_cache = (key, U0)
        U0 = self._marg_cache[1]
        g = nu.instrument.gains(v, getattr(v, "given", None))[:, [rows[0] for rows in self._blocks()]]
        return np.einsum("nb,bik->nik", g, U0)

    def _blocks(self):
        """Row indices of each (kind, pair) block (the gains are constant on each)."""
        if not hasattr(self, "_block_rows"):
            key = np.char.add(np.asarray(self.data.kind).astype(str), np.asarray(self.data.pair).astype(str))
            self._block_rows = [np.flatnonzero(key == k) for k in dict.fromkeys(key.tolist())]
        return self._block_rows

    def _residuals(self, B, nuisance):
        """Whitened residuals r (n, N) at the analytic parameters' prior means, and their columns U."""
        B = np.atleast_2d(B)
        v = self._values(nuisance, len(B))
        m = self.nuisance.apply_many(B, v)
        if len(m) == 1:
            r = self._trsv(self._chol, self._value - m[0], lower=1)[None, :]
        else:
            r = linalg.solve_triangular(self._chol, (self._value[None, :] - m).T, lower=True, check_finite=False).T
        return r, (self._columns(B, v) if self.marginal is not None else None)

    def loglike_many(self, B: np.ndarray, nuisance: dict | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(ln L (n,), χ² (n,)) for binned theory B (n, N) and nuisance values (scalars or (n,) arrays)."""
        B = np.atleast_2d(B)
        if self.marginal is None and self.low is None:
            r, _ = self._residuals(B, nuisance)
            chi2 = np.einsum("ij,ij->i", r, r)
            return -0.5 * chi2 - self._lognorm, chi2
        if self.marginal is None:
            m = self.model_many(B, nuisance)
            chi2 = np.array([self.chi2(row) for row in m])
            return -0.5 * chi2 - self._lognorm, chi2
        r, U = self._residuals(B, nuisance)
        chi2, lndet, _, _ = self.marginal.solve(r, U)
        return -0.5 * (chi2 + lndet) - self._lognorm, chi2

    def model(self, spectra: Spectra, nuisance: dict[str, float] | None = None) -> np.ndarray:
        """Model band powers (N,) in the dataset's units; analytic parameters at their conditional best fit."""
        return self.model_from_bands(self.binned(spectra), nuisance)

    def model_from_bands(self, B: np.ndarray, nuisance: dict | None = None) -> np.ndarray:
        """Model band powers (N,) from binned theory B (N,) (analytic parameters at their conditional best fit)."""
        m = self.model_many(B, nuisance)[0]
        if self.marginal is not None:
            r, U = self._residuals(B, nuisance)
            a, _ = self.marginal.conditional(r, U)
            v = self._values(nuisance, 1)
            m = m + self.nuisance.columns(np.atleast_2d(B), v, self.marginal.names)[0] @ (a[0] - self.marginal.mean)
        return m

    def conditional(self, B: np.ndarray, nuisance: dict | None = None) -> dict[str, tuple[float, float]]:
        """The analytic parameters' conditional best fit and standard deviation at one point."""
        if self.marginal is None:
            return {}
        r, U = self._residuals(B, nuisance)
        a, sd = self.marginal.conditional(r, U)
        return {n: (float(a[0, i]), float(sd[0, i])) for i, n in enumerate(self.marginal.names)}

    @property
    def n_residuals(self) -> int:
        """Length of `whiten_bands`' vector: N, plus one per analytic parameter."""
        return self.n + (self.marginal.k if self.marginal is not None else 0)

    def whiten_bands(self, B: np.ndarray, nuisance: dict | None = None) -> np.ndarray:
        """Whitened residuals whose squared norm is the point's χ² (marginal χ² with analytic parameters)."""
        if self.marginal is None:
            return self.whiten(self.model_many(B, nuisance)[0])
        r, U = self._residuals(B, nuisance)
        return self.marginal.whitened(r, U)[0]

    def chi2(self, model: np.ndarray) -> float:
        """(d − m)ᵀ C⁻¹ (d − m) of a model vector, plus the Hamimeche–Lewis term of the low-ℓ bands."""
        if self.low is None:
            z = self._trsv(self._chol, self._value - model, lower=1)
            return float(z @ z)
        z = self._trsv(self._chol, self._value - model[self._gauss], lower=1)
        return float(z @ z) + self.low.chi2(model[self._low_rows])

    def loglike(self, spectra: Spectra, nuisance: dict[str, float] | None = None) -> tuple[float, float]:
        """(ln L, χ²)."""
        return self.loglike_bands(self.binned(spectra), nuisance)

    def loglike_bands(self, B: np.ndarray, nuisance: dict | None = None) -> tuple[float, float]:
        """(ln L, χ²) from the binned theory B (N,)."""
        if self.marginal is None:
            c2 = self.chi2(self.nuisance.apply(B, nuisance))
            return -0.5 * c2 - self._lognorm, c2
        ll, c2 = self.loglike_many(B[None, :], nuisance)
        return float(ll[0]), float(c2[0])

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
