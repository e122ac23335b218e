"""Fisher matrices of band-power models: F_ij = ∂_i Bᵀ C⁻¹ ∂_j B for a parameter-independent
covariance (Tegmark, Taylor & Heavens 1997, ApJ 480, 22).

`fisher_matrix` takes the derivatives; `numerical_fisher` computes them for any band-power model
function by central differences, ∂_i B ≈ [B(θ + h e_i) − B(θ − h e_i)] / 2h (error O(h²)), and checks
the step: each parameter's step is halved until two successive derivative estimates agree to ``rtol``
in the data's own noise units, ‖L⁻¹(d_h − d_{h/2})‖ / ‖L⁻¹ d_{h/2}‖ with C = L Lᵀ (so a change the
data could never see does not count). The derivative at the smaller step is kept; for an O(h²) rule its
remaining truncation error is about a third of that change (Richardson's argument).

What it is: the Fisher matrix is the curvature of the Gaussian log-likelihood at θ, and F⁻¹ the
covariance of its Gaussian (Laplace) approximation — exact only for a model linear in θ with Gaussian
priors. It is an approximation of the posterior, labelled so, and returned with its diagnostics
(steps used, last relative change, convergence flag, model evaluations); a sampler's chain, not F⁻¹,
is what the project reports as constraints.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy import linalg


def fisher_matrix(derivs: dict, covariance) -> np.ndarray:
    """F_ij = ∂_i Bᵀ C⁻¹ ∂_j B, rows and columns in the order of ``derivs`` (a mapping name → (N,)
    derivative of the band powers)."""
    cov = np.asarray(covariance, dtype=float)
    if cov.ndim != 2 or cov.shape[0] != cov.shape[1]:
        raise ValueError(f"covariance must be square, got shape {cov.shape}")
    names = list(derivs)
    if not names:
        raise ValueError("no derivatives given")
    d = np.array([np.asarray(derivs[k], dtype=float) for k in names])
    if d.shape != (len(names), cov.shape[0]):
        raise ValueError(f"derivatives must each have {cov.shape[0]} entries, got shape {d.shape}")
    factor = linalg.cho_factor(cov, lower=True)
    fisher = d @ linalg.cho_solve(factor, d.T)
    return 0.5 * (fisher + fisher.T)


@dataclass(frozen=True)
class NumericalFisher:
    """A Fisher matrix from central differences, with the diagnostics of its step-size check."""

    names: tuple[str, ...]
    x0: np.ndarray            # (P,) where the derivatives were taken
    matrix: np.ndarray        # (P, P) F
    derivs: np.ndarray        # (P, N) ∂B/∂θ_i at the step kept
    steps: np.ndarray         # (P,) step h_i kept
    change: np.ndarray        # (P,) relative change of ∂_i B over the last halving (noise units)
    converged: np.ndarray     # (P,) bool: change ≤ rtol
    rtol: float
    evaluations: int          # calls of the model (points evaluated)

    @property
    def all_converged(self) -> bool:
        return bool(np.all(self.converged))

    def covariance(self, prior_precision=None) -> np.ndarray:
        """(F + prior precision)⁻¹: the covariance of the Gaussian approximation (labelled as such).
        ``prior_precision`` is a (P,) diagonal (1/σ² of normal priors, 0 for flat) or (P, P)."""
        f = np.array(self.matrix, dtype=float)
        if prior_precision is not None:
            pp = np.asarray(prior_precision, dtype=float)
            f = f + (np.diag(pp) if pp.ndim == 1 else pp)
        return linalg.inv(f)

    def summary(self) -> str:
        """One line per parameter: step, relative change, convergence."""
        return "\n".join(f"{n}: h = {h:.3g}, last change {c:.2g} ({'converged' if ok else 'NOT converged'}"
                         f" at rtol {self.rtol:g})"
                         for n, h, c, ok in zip(self.names, self.steps, self.change, self.converged))


def numerical_fisher(model: Callable, x0, steps, covariance, *, names=None, rtol: float = 1e-3,
                     max_halvings: int = 8, vectorized: bool = False) -> NumericalFisher:
    """Fisher matrix of the band-power model ``model(θ) → (N,)`` at ``x0`` by central differences.

    ``steps`` (P,) are the first steps h_i (> 0); each is halved, at most ``max_halvings`` times, until
    two successive estimates of ∂_i B agree to ``rtol`` (see the module docstring). With
    ``vectorized``, ``model`` takes an (M, P) array of points and returns (M, N) — one call per round,
    so that an evaluator can spread the stencil over processes. Never raises for a step that does not
    converge: the result says so in ``converged`` and ``change``.
    """
    x0 = np.asarray(x0, dtype=float)
    h = np.array(steps, dtype=float).reshape(-1)
    p = x0.size
    if x0.ndim != 1 or h.shape != (p,):
        raise ValueError(f"x0 and steps must be 1-d of one length, got {x0.shape} and {h.shape}")
    if not np.all(np.isfinite(h) & (h > 0)):
        raise ValueError(f"steps must be finite and positive, got {h}")
    names = tuple(names) if names is not None else tuple(f"p{i}" for i in range(p))
    chol = linalg.cholesky(np.asarray(covariance, dtype=float), lower=True)
    evaluations = 0

    def evaluate(points: np.ndarray) -> np.ndarray:
        nonlocal evaluations
        evaluations += len(points)
        if vectorized:
            out = np.asarray(model(points), dtype=float)
        else:
            out = np.array([np.asarray(model(x), dtype=float) for x in points])
        if out.ndim != 2 or out.shape[0] != len(points) or out.shape[1] != chol.shape[0]:
            raise ValueError(f"model must return {chol.shape[0]} band powers per point, got {out.shape}")
        return out

    def derivatives(which: np.ndarray) -> np.ndarray:
        points = np.repeat(x0[None, :], 2 * len(which), axis=0)
        for k, i in enumerate(which):
            points[2 * k, i] += h[i]
            points[2 * k + 1, i] -= h[i]
        b = evaluate(points)
        return (b[0::2] - b[1::2]) / (2.0 * h[which, None])

    def whitened_norm(d: np.ndarray) -> np.ndarray:
        return np.linalg.norm(linalg.solve_triangular(chol, d.T, lower=True), axis=0)

    all_idx = np.arange(p)
    derivs = derivatives(all_idx)
    change = np.full(p, np.inf)
    todo = all_idx
    for _ in range(max_halvings):
        if not todo.size:
            break
        h[todo] *= 0.5
        finer = derivatives(todo)
        scale = whitened_norm(finer)
        diff = whitened_norm(finer - derivs[todo])
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = np.where(scale > 0, diff / scale, np.where(diff > 0, np.inf, 0.0))
        change[todo] = rel
        derivs[todo] = finer
        todo = todo[~(rel <= rtol)]
    converged = change <= rtol
    cinv_d = linalg.cho_solve((chol, True), derivs.T)
    fisher = derivs @ cinv_d
    fisher = 0.5 * (fisher + fisher.T)
    return NumericalFisher(names=names, x0=x0, matrix=fisher, derivs=derivs, steps=h, change=change,
                           converged=converged, rtol=float(rtol), evaluations=evaluations)


__all__ = ["fisher_matrix", "numerical_fisher", "NumericalFisher"]
