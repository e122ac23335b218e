"""The curvature of −2 ln p at an optimum and the Laplace (Gaussian) approximation it implies.

For a Gaussian likelihood in whitened residuals r(θ) = L⁻¹(d − m(θ)), −2 ln L = rᵀr + const, and its
Hessian is 2 (JᵀJ + Σ_b r_b ∇²r_b). Dropping the second term gives the Gauss–Newton curvature
F = JᵀJ, which is the Fisher information of the data at θ (Tegmark, Taylor & Heavens 1997, ApJ 480, 22)
and equals the Hessian exactly for a model linear in θ. A Gaussian prior N(μ, σ²) adds 1/σ² on the
diagonal. The Laplace approximation of the posterior is then N(θ̂, F⁻¹) (e.g. Gelman et al. 2013,
*Bayesian Data Analysis*, 3rd ed., §4.1). It is an approximation and labelled as one: it ignores the
residual-weighted second derivatives, and it is poor for a parameter on a prior bound (the posterior is
cut there), which `laplace` reports beside the numbers.
"""
from __future__ import annotations

import numpy as np


def laplace(jac_theta: np.ndarray, prior_sd: np.ndarray | None = None) -> dict:
    """Curvature F (P, P) from the data Jacobian ∂r/∂θ (M, P) plus Gaussian prior terms (``prior_sd``,
    ``inf`` for none), its inverse as the Laplace covariance, marginal σ's, the correlation matrix and the
    condition number of F. A singular F (an unconstrained direction) gives the pseudo-inverse and
    ``singular`` = True."""
    J = np.asarray(jac_theta, float)
    F = J.T @ J
    if prior_sd is not None:
        sd = np.asarray(prior_sd, float)
        F = F + np.diag(np.where(np.isfinite(sd), 1.0 / sd ** 2, 0.0))
    # Scale to unit diagonal before inverting: parameters differ in magnitude by orders (ω_b vs ln A_s).
    d = np.sqrt(np.diag(F))
    d[d == 0] = 1.0
    Fs = F / np.outer(d, d)
    w = np.linalg.eigvalsh(Fs)
    cond = float(w[-1] / w[0]) if w[0] > 0 else float("inf")
    singular = not (w[0] > 1e-12 * w[-1])
    cov = (np.linalg.pinv(Fs, rcond=1e-12, hermitian=True) if singular else np.linalg.inv(Fs)) / np.outer(d, d)
    cov = 0.5 * (cov + cov.T)
    sigma = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(sigma, sigma)
    return {"curvature": F, "covariance": cov, "sigma": sigma, "correlation": corr, "condition": cond,
            "singular": singular}
