"""Prior densities and the sampled parameter space.

Three kinds, the trade's usual choices: uniform on [a, b]; normal N(μ, σ²); normal truncated to [a, b]
(renormalised, so the log-density is comparable across runs). Log-densities are summed over parameters
(independent priors). Points outside the support get −∞ before any theory call, which is what keeps
the Boltzmann code out of unphysical corners.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import special

from infer.config import Parameter, support
from infer.errors import UserError


class PriorSet:
    """Independent priors of the sampled parameters, vectorised over parameter order."""

    def __init__(self, parameters: tuple[Parameter, ...], where: str = "run file"):
        self.names = tuple(p.name for p in parameters)
        lo, hi = zip(*(support(p.prior) for p in parameters)) if parameters else ((), ())
        self.lower = np.array(lo, float)
        self.upper = np.array(hi, float)
        kinds = [p.prior.kind for p in parameters]
        self._normal = np.array([k != "uniform" for k in kinds])
        self._mu = np.array([p.prior.args[0] if k != "uniform" else 0.0 for p, k in zip(parameters, kinds)])
        self._sd = np.array([p.prior.args[1] if k != "uniform" else 1.0 for p, k in zip(parameters, kinds)])
        # Constant part of the log-density: -log(b - a) for uniform; -log(σ√(2π) Z) for (truncated) normal
        # with Z = Φ((b-μ)/σ) - Φ((a-μ)/σ).
        # A prior whose constant is not finite (a width that overflows, a truncated normal with no mass in
        # its range) would give every point -inf: refused here, naming the parameter.
        const = []
        for p, k in zip(parameters, kinds):
            key = f"{where}: 'parameters.{p.name}.prior'"
            if k == "uniform":
                width = p.prior.args[1] - p.prior.args[0]
                if not math.isfinite(width):
                    raise UserError(f"{key}: the uniform range {list(p.prior.args)} is too wide for floating "
                                    "point (its width overflows)")
                const.append(-math.log(width))
            else:
                mu, sd = p.prior.args[:2]
                a, b = support(p.prior)
                z = special.ndtr((b - mu) / sd) - special.ndtr((a - mu) / sd)
                if not z > 0:
                    raise UserError(f"{key}: the normal N({mu}, {sd}²) has no probability mass (in double "
                                    f"precision) inside range [{a}, {b}]")
                c = -math.log(sd * math.sqrt(2 * math.pi) * z)
                if not math.isfinite(c):
                    raise UserError(f"{key}: the normal N({mu}, {sd}²) has a density that overflows")
                const.append(c)
        self._const = float(np.sum(const))
        self._any_normal = bool(self._normal.any())

    def inside(self, x: np.ndarray) -> bool:
        return bool(((x > self.lower) & (x < self.upper)).all())

    def logpdf(self, x: np.ndarray) -> float:
        """Log prior density at one point x (P,); −∞ outside the support."""
        if not self.inside(x):
            return -math.inf
        if not self._any_normal:
            return self._const
        z = (x[self._normal] - self._mu[self._normal]) / self._sd[self._normal]
        return self._const - 0.5 * float(z @ z)

    def logpdf_many(self, X: np.ndarray) -> np.ndarray:
        """Log prior densities at the rows of X (n, P), vectorised (the surrogate engine's cheap calls);
        equal to `logpdf` row by row."""
        X = np.atleast_2d(np.asarray(X, float))
        inside = np.all((X > self.lower) & (X < self.upper), axis=1)
        out = np.full(len(X), self._const)
        if self._any_normal:
            z = (X[:, self._normal] - self._mu[self._normal]) / self._sd[self._normal]
            out = out - 0.5 * np.einsum("ij,ij->i", z, z)
        return np.where(inside, out, -np.inf)

    @property
    def bounds(self) -> dict[str, tuple[float, float]]:
        return {n: (float(a), float(b)) for n, a, b in zip(self.names, self.lower, self.upper)}
