"""Gaussian-process regression of one scalar function with an anisotropic stationary kernel.

Method (Rasmussen & Williams 2006, *Gaussian Processes for Machine Learning*, MIT Press; equation numbers
cited from memory): a zero-mean GP prior f ~ GP(0, s² k(r)) with the scaled distance
r² = Σ_p (x_p − x'_p)² / ℓ_p² (one length per input: "automatic relevance determination", §5.1), observed
with a small white-noise nugget σ_n² (plus a fixed jitter 10⁻⁸ s² for conditioning);

* ``se``  — squared exponential, k = exp(−r²/2) (eq. 4.9);
* ``m52`` — Matérn ν = 5/2, k = (1 + √5 r + 5r²/3) exp(−√5 r) (eq. 4.17).

Hyperparameters (log s, log ℓ_1…ℓ_P, log σ_n) maximise the log marginal likelihood (eq. 5.8)

    ln p(y | X) = −½ yᵀ K⁻¹ y − Σ ln diag chol(K) − (n/2) ln 2π,   K = s² k(X, X) + σ_n² I,

by L-BFGS-B with its analytic gradient ½ tr((α αᵀ − K⁻¹) ∂K/∂θ_j), α = K⁻¹ y (eq. 5.9), within bounds,
from a common starting length of 3 input units (about the radius of a whitened design; more starts are
possible, but on the band-power problems measured they reached the same optimum). The posterior mean at
new points is k(x*, X) α (eq. 2.25).

Why written here rather than taken from scikit-learn: the surrogate needs one small GP per principal
component, evaluated together in one vectorised call (`predict_stack`) and stored as plain arrays; the
whole method is ~100 lines of NumPy/SciPy, and on the demo a GP does not beat a quadratic polynomial
(benchmarks/bench_surrogate.py), so a further dependency would buy nothing measurable.

Targets are standardised (divided by their standard deviation) before the fit and scaled back after.
Pure NumPy/SciPy; the surrogate (`infer.theory.surrogate`) calls `fit` once per principal component
and evaluates many fitted GPs at once with `predict_stack`.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import linalg, optimize

__all__ = ["fit", "predict_stack", "kernel_matrix", "KERNELS"]

KERNELS = ("se", "m52")
_SQRT5 = math.sqrt(5.0)
# Bounds of the hyperparameters, on standardised targets and whitened inputs (|x| of a few units):
_LOG_LEN = (math.log(0.05), math.log(1e3))
_LOG_AMP = (math.log(1e-3), math.log(1e4))
_LOG_NOISE = (math.log(1e-6), math.log(0.3))   # nugget sd, in units of the target's sd
_JITTER = 1e-8  # relative to s²: keeps cond(K) ≲ 1e8·n when a long, tall kernel mimics a polynomial


def _kernel_of_r2(r2: np.ndarray, kernel: str) -> np.ndarray:
    if kernel == "se":
        return np.exp(-0.5 * r2)
    r = np.sqrt(np.maximum(r2, 0.0))
    return (1.0 + _SQRT5 * r + (5.0 / 3.0) * r2) * np.exp(-_SQRT5 * r)


def _scaled_sqdist(a: np.ndarray, b: np.ndarray, inv_len: np.ndarray) -> np.ndarray:
    """r² between rows of a (m, P) and b (n, P) with per-input scales 1/ℓ."""
    a = a * inv_len
    b = b * inv_len
    r2 = np.sum(a * a, 1)[:, None] + np.sum(b * b, 1)[None, :] - 2.0 * a @ b.T
    return np.maximum(r2, 0.0)


def kernel_matrix(a, b, log_amp: float, log_len, kernel: str) -> np.ndarray:
    """s² k(a, b), shape (len(a), len(b))."""
    inv_len = np.exp(-np.asarray(log_len, float))
    return math.exp(2 * log_amp) * _kernel_of_r2(_scaled_sqdist(np.asarray(a, float), np.asarray(b, float),
                                                                 inv_len), kernel)


def _nll_and_grad(params: np.ndarray, X: np.ndarray, y: np.ndarray, kernel: str, d2: np.ndarray):
    """Negative log marginal likelihood and its gradient in (log s, log ℓ…, log σ_n)."""
    n, P = X.shape
    log_amp, log_len, log_noise = params[0], params[1:P + 1], params[P + 1]
    amp2 = math.exp(2 * log_amp)
    scaled = d2 * np.exp(-2 * log_len)[:, None, None]          # (P, n, n): (Δx_p/ℓ_p)²
    r2 = scaled.sum(0)
    if kernel == "se":
        base = np.exp(-0.5 * r2)
        dk_dloglen = base                                      # ∂k/∂ln ℓ_p = k · (Δx_p/ℓ_p)²
    else:
        r = np.sqrt(r2)
        e = np.exp(-_SQRT5 * r)
        base = (1.0 + _SQRT5 * r + (5.0 / 3.0) * r2) * e
        dk_dloglen = (5.0 / 3.0) * (1.0 + _SQRT5 * r) * e       # ∂k/∂ln ℓ_p = this · (Δx_p/ℓ_p)²
    base[np.diag_indices(n)] += _JITTER
    K = amp2 * base
    noise2 = math.exp(2 * log_noise)
    K[np.diag_indices(n)] += noise2
    try:
        c, low = linalg.cho_factor(K, lower=True, check_finite=False)
    except linalg.LinAlgError:
        return 1e25, np.zeros_like(params)
    alpha = linalg.cho_solve((c, low), y, check_finite=False)
    nll = 0.5 * y @ alpha + np.sum(np.log(np.diag(c))) + 0.5 * n * math.log(2 * math.pi)
    W = np.outer(alpha, alpha) - linalg.cho_solve((c, low), np.eye(n), check_finite=False)
    grad = np.empty_like(params)
    grad[0] = -0.5 * np.sum(W * (2.0 * amp2 * base))
    G = amp2 * dk_dloglen
    grad[1:P + 1] = -0.5 * np.einsum("ij,pij->p", W * G, scaled)
    grad[P + 1] = -0.5 * np.trace(W) * 2.0 * noise2
    return float(nll), grad


def fit(X, y, kernel: str = "m52", starts=(3.0,)) -> dict:
    """Fit a GP to y (n,) at inputs X (n, P); returns a dict of plain arrays/floats (see `predict_stack`).

    ``starts``: initial common length scales (in input units) of the L-BFGS-B restarts; the fit with the
    highest marginal likelihood is kept. A constant (or nearly constant: sd < 1e-300) target gives a GP
    that predicts its mean.
    """
    if kernel not in KERNELS:
        raise ValueError(f"gp.fit: kernel must be one of {KERNELS}, got {kernel!r}")
    X = np.asarray(X, float)
    y = np.asarray(y, float)
    n, P = X.shape
    scale = float(np.std(y))
    if n < 2 or not scale > 1e-300:
        return {"log_amp": 0.0, "log_len": np.zeros(P), "log_noise": 0.0, "alpha": np.zeros(n), "scale": 0.0,
                "nll": 0.0}
    ys = y / scale
    d2 = (X[:, None, :] - X[None, :, :]).transpose(2, 0, 1) ** 2
    bounds = [_LOG_AMP] + [_LOG_LEN] * P + [_LOG_NOISE]
    best = None
    for length in starts:
        x0 = np.concatenate([[0.0], np.full(P, math.log(length)), [math.log(1e-3)]])
        res = optimize.minimize(_nll_and_grad, x0, args=(X, ys, kernel, d2), jac=True, method="L-BFGS-B",
                                bounds=bounds, options={"maxiter": 300})
        if best is None or res.fun < best.fun:
            best = res
    p = best.x
    K = kernel_matrix(X, X, p[0], p[1:P + 1], kernel)
    K[np.diag_indices(n)] += math.exp(2 * p[P + 1]) + _JITTER * math.exp(2 * p[0])
    alpha = linalg.cho_solve(linalg.cho_factor(K, lower=True), ys)
    return {"log_amp": float(p[0]), "log_len": p[1:P + 1].copy(), "log_noise": float(p[P + 1]),
            "alpha": alpha * scale, "scale": scale, "nll": float(best.fun)}


def predict_stack(Z: np.ndarray, X: np.ndarray, log_amp: np.ndarray, log_len: np.ndarray, alpha: np.ndarray,
                  kernel: str) -> np.ndarray:
    """Posterior means of K fitted GPs sharing training inputs X (n, P) at points Z (m, P): (m, K).

    ``log_amp`` (K,), ``log_len`` (K, P), ``alpha`` (K, n) (already multiplied by each target's scale).
    """
    inv_len = np.exp(-log_len)                                      # (K, P)
    r2 = np.zeros((len(log_amp), len(Z), len(X)))
    for p in range(X.shape[1]):            # direct differences, one input at a time: no cancellation at
        d = (Z[:, p][:, None] - X[:, p][None, :])[None] * inv_len[:, p][:, None, None]   # long lengths and
        r2 += d * d                        # no (K, m, n, P) temporary
    k = _kernel_of_r2(r2, kernel) * np.exp(2 * log_amp)[:, None, None]
    return np.einsum("kmn,kn->mk", k, alpha)
