"""Posterior-predictive check of a band-power fit (Gelman, Meng & Stern 1996, Statistica Sinica 6, 733).

For S posterior draws θ_s (for an importance-weighted sample, drawn with probability ∝ weight, so that the S
draws are equally weighted), one replicated data set per draw d_rep ~ N(m(θ_s), C), and the discrepancy
χ²(d, θ) = (d − m(θ))ᵀ C⁻¹ (d − m(θ)); the posterior-predictive p-value is

    p_B = P(χ²(d_rep, θ) ≥ χ²(d_obs, θ) | d_obs),

estimated by the fraction of draws with χ²_rep ≥ χ²_obs, with the binomial Monte Carlo error
√(p(1 − p)/S) (draws taken independently). Assumptions: the likelihood is the Gaussian in band powers with
covariance C (replicates are drawn from it); a p-value near 0 says the data are less typical of the model
than its own replicates. p_B is conservative (not uniform under the model; it piles towards ½), which is
why the test of this module compares with the closed form of a linear model rather than with uniformity.

Pure NumPy; the caller supplies the model band powers at the draws (one theory call each: `select_draws`
chooses which, so the caller can keep S small for a costly theory).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class PredictiveCheck:
    """The posterior-predictive p-value, its Monte Carlo error and what it was made of."""

    p_value: float
    error: float
    draws: int
    chi2_obs: np.ndarray       # (S,) χ²(d_obs, θ_s)
    chi2_rep: np.ndarray       # (S,) χ²(d_rep,s, θ_s)


def select_draws(n: int, draws: int, weights=None, rng=None) -> np.ndarray:
    """Indices of ``draws`` posterior draws out of ``n``: with probability ∝ ``weights`` (with replacement)
    for a weighted sample, uniformly without replacement otherwise (with replacement if draws > n)."""
    rng = np.random.default_rng(rng)
    if weights is not None:
        w = np.asarray(weights, float)
        w = np.where(np.isfinite(w) & (w > 0), w, 0.0)
        if not w.sum() > 0:
            raise ValueError("no positive weight")
        return rng.choice(n, size=draws, replace=True, p=w / w.sum())
    return rng.choice(n, size=draws, replace=draws > n)


def predictive_check(value: np.ndarray, covariance: np.ndarray, models: np.ndarray, rng=None) -> PredictiveCheck:
    """p_B for observed band powers ``value`` (N,), covariance (N, N) and the model band powers at S equally
    weighted posterior draws ``models`` (S, N) (module docstring)."""
    rng = np.random.default_rng(rng)
    d = np.asarray(value, float)
    m = np.atleast_2d(np.asarray(models, float))
    chol = np.linalg.cholesky(np.asarray(covariance, float))
    from scipy.linalg import solve_triangular
    z_obs = solve_triangular(chol, (d - m).T, lower=True)
    chi2_obs = np.sum(z_obs ** 2, axis=0)
    # d_rep − m(θ) = L ε with ε ~ N(0, I), so χ²_rep = |ε|² exactly (no solve needed).
    eps = rng.standard_normal(m.shape)
    chi2_rep = np.sum(eps ** 2, axis=1)
    s = m.shape[0]
    p = float(np.mean(chi2_rep >= chi2_obs))
    return PredictiveCheck(p, math.sqrt(max(p * (1 - p), 1.0 / s) / s), s, chi2_obs, chi2_rep)


__all__ = ["PredictiveCheck", "predictive_check", "select_draws"]
