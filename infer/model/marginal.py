"""Analytic marginalisation of nuisance parameters that enter the model linearly with Gaussian priors.

If m(θ, a) = m̄(θ) + T(θ)(a − μ) with a ~ N(μ, Σ) and the data Gaussian with covariance C, the integral
over a is again Gaussian: d ~ N(m̄, C + T Σ Tᵀ) (Bridle, Crittenden, Melchiorri, Hobson, Kneissl &
Lasenby 2002, MNRAS 335, 1193). With C = L Lᵀ, the whitened residual r = L⁻¹(d − m̄) and the whitened,
prior-scaled columns V = L⁻¹ T S (S = diag σ for independent priors), the Woodbury identity and
Sylvester's determinant theorem give, without ever forming or factorising C + TΣTᵀ,

    χ²_marg = rᵀr − bᵀ A⁻¹ b,        ln det(C + TΣTᵀ) = ln det C + ln det A,
    A = I + VᵀV,  b = Vᵀ r.

The same algebra is a least-squares problem: χ²_marg = min_u |r − V u|² + |u|², solved by û = A⁻¹ b, so
the whitened residual vector [r − V û, û] (length N + K) has squared norm χ²_marg — what the
Levenberg–Marquardt fit works on. The conditional best fit of the amplitudes is â = μ + S û with
conditional covariance S A⁻¹ S (reported in the summary).

The prior must be an untruncated normal (checked where the run file is read): truncation would make the
integral non-Gaussian. Cost per point: K triangular solves when T depends on θ (sampled calibrations,
SED parameters, beam modes), one K-vector product otherwise (cached).
"""
from __future__ import annotations

import numpy as np
from scipy import linalg


class AnalyticMarginal:
    """The marginalised parameters ``names`` with prior means ``mean`` and standard deviations ``sd``."""

    def __init__(self, names, mean, sd):
        self.names = tuple(names)
        self.mean = np.asarray(mean, float)
        self.sd = np.asarray(sd, float)
        self.k = len(self.names)

    def solve(self, r: np.ndarray, U: np.ndarray):
        """For whitened residuals r (n, N) and whitened columns U = L⁻¹T (n, N, K): χ²_marg (n,),
        ln det A (n,), û (n, K) and A⁻¹ (n, K, K)."""
        V = U * self.sd[None, None, :]
        A = np.eye(self.k)[None] + np.einsum("nik,nil->nkl", V, V)
        b = np.einsum("nik,ni->nk", V, r)
        chol = np.linalg.cholesky(A)
        y = np.linalg.solve(chol, b[..., None])[..., 0]
        u = np.linalg.solve(np.swapaxes(chol, 1, 2), y[..., None])[..., 0]
        chi2 = np.einsum("ni,ni->n", r, r) - np.einsum("nk,nk->n", y, y)
        lndet = 2.0 * np.sum(np.log(np.diagonal(chol, axis1=1, axis2=2)), axis=1)
        inv = np.linalg.inv(A)
        return chi2, lndet, u, inv

    def whitened(self, r: np.ndarray, U: np.ndarray) -> np.ndarray:
        """[r − V û, û] (n, N + K): its squared norm is χ²_marg."""
        V = U * self.sd[None, None, :]
        _, _, u, _ = self.solve(r, U)
        return np.concatenate([r - np.einsum("nik,nk->ni", V, u), u], axis=1)

    def conditional(self, r: np.ndarray, U: np.ndarray):
        """Conditional best-fit amplitudes â (n, K) and their conditional standard deviations (n, K)."""
        _, _, u, inv = self.solve(r, U)
        a = self.mean[None, :] + self.sd[None, :] * u
        sd = self.sd[None, :] * np.sqrt(np.diagonal(inv, axis1=1, axis2=2))
        return a, sd


def whiten_columns(chol: np.ndarray, T: np.ndarray) -> np.ndarray:
    """U = L⁻¹ T for columns T (n, N, K): one triangular solve with n·K right-hand sides."""
    n, N, K = T.shape
    rhs = np.moveaxis(T, 1, 0).reshape(N, n * K)
    U = linalg.solve_triangular(chol, rhs, lower=True, check_finite=False)
    return np.moveaxis(U.reshape(N, n, K), 0, 1)
