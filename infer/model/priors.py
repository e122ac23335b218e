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


class DerivedPriors:
    """Priors on derived quantities (``[derived.NAME] prior = ...``), applied after the theory call:
    ln p(θ) gains ln π_D(D(θ)) for each derived quantity D — a prior on a function of the parameters,
    e.g. a Gaussian on H₀ while θ_* is sampled. Same three kinds as `PriorSet`, each normalised in D."""

    def __init__(self, priors: dict, where: str = "run file"):
        from infer.config import Parameter as _P
        self.names = tuple(priors)
        self._set = PriorSet(tuple(_P(n, p, None, None, None, n) for n, p in priors.items()), where)

    def logpdf(self, values) -> float:
        """ln π_D at the derived values (in ``names`` order); −∞ outside a derived prior's support."""
        return self._set.logpdf(np.asarray(values, float))


def read_derived_section(path, table, base, theory, parameters) -> dict:
    """The ``[derived.NAME]`` reader of `infer.config.SECTION_READERS`: name → `Prior` (only the key
    ``prior``; whether NAME is a derived quantity of the theory is checked when the posterior is built)."""
    import re
    from infer import validate
    from infer.parameters import _prior
    if not isinstance(table, dict):
        raise UserError(f"{path}: [derived] must hold [derived.NAME] tables")
    sampled = {p.name for p in parameters}
    out = {}
    for name, spec in table.items():
        if not (isinstance(spec, dict) and re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", name)):
            raise UserError(f"{path}: [derived.{name}] must be a table with a 'prior'")
        validate.check_keys(path, f"derived.{name}", spec, {"prior"})
        if "prior" not in spec:
            raise UserError(f"{path}: [derived.{name}] needs a 'prior'")
        if name in sampled:
            raise UserError(f"{path}: [derived.{name}]: {name} is a parameter of the run; put its prior "
                            f"in [parameters.{name}]")
        out[name] = _prior(path, name, spec["prior"], section="derived")
    return out
