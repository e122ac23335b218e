"""The ``[parameters.NAME]`` tables of a run file: prior specifications, fixed values, starting-ball keys.

Three prior kinds, the trade's usual choices: uniform on [a, b]; normal N(μ, σ²); normal truncated to
[a, b] (``range``). Every value is checked where it is read (`infer.validate`), with one line naming the
file and the key: a uniform prior's width must be a finite double, a truncated normal must hold at least
`MIN_PRIOR_MASS` of its normal's probability inside its range (computed in the lower tail with
``scipy.special.log_ndtr``, so it does not underflow as a difference of two CDFs near 1 does), a guess must
lie inside the support and a starting spread must not be wider than the prior. The densities themselves
live in `infer.model.priors`.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass

from scipy import special

from infer import validate
from infer.errors import UserError

PARAM_KEYS = {"prior", "value", "guess", "spread", "tex", "analytic"}
#: Smallest probability a truncated-normal prior may hold inside its range.
MIN_PRIOR_MASS = 1e-12


@dataclass(frozen=True)
class Prior:
    """``kind`` is 'uniform', 'normal' or 'truncnormal'; ``args`` as documented in `infer.priors`."""
    kind: str
    args: tuple[float, ...]


@dataclass(frozen=True)
class Parameter:
    name: str
    prior: Prior | None          # None for a fixed parameter
    value: float | None          # fixed value, or None when sampled
    guess: float | None
    spread: float | None
    tex: str
    analytic: bool = False       # integrated out in closed form (infer.model.marginal), not sampled


def truncnormal_log_mass(mu: float, sd: float, lo: float, hi: float) -> float:
    """ln Z, Z = Φ((hi−μ)/σ) − Φ((lo−μ)/σ), accurate in both tails (−∞ when Z underflows).

    The range is mirrored into the lower tail, where ``log_ndtr`` keeps full relative precision, and
    ln Z = ln Φ(b) + ln(−expm1(ln Φ(a) − ln Φ(b))) avoids the cancellation of two CDFs near 1."""
    a, b = (lo - mu) / sd, (hi - mu) / sd
    if a > 0:
        a, b = -b, -a
    la, lb = float(special.log_ndtr(a)), float(special.log_ndtr(b))
    if not math.isfinite(lb) or not la < lb:
        return -math.inf
    return lb + math.log(-math.expm1(la - lb))


def log_normalisation(prior: "Prior") -> float:
    """The constant of the prior's log-density: −ln(b − a) for uniform, −ln(σ√(2π) Z) for a
    (truncated) normal (Z = 1 untruncated). Finite for every prior `parse` accepts."""
    if prior.kind == "uniform":
        a, b = prior.args
        return -math.log(b - a) if math.isfinite(b - a) and b > a else -math.inf
    mu, sd = prior.args[:2]
    log_z = truncnormal_log_mass(mu, sd, *prior.args[2:]) if prior.kind == "truncnormal" else 0.0
    return -(math.log(sd * math.sqrt(2.0 * math.pi)) + log_z)     # σ√(2π) overflowing: −∞


def _prior(path, name, spec, section: str = "parameters") -> Prior:
    key = f"{section}.{name}.prior"
    if not isinstance(spec, dict) or not spec:
        raise UserError(f"{path}: '{key}' must be a table such as {{ uniform = [0.0, 1.0] }} "
                        "or { normal = [mean, sd] } (optionally with range = [lo, hi]), "
                        f"got {validate.show(spec)}")
    kinds = [k for k in spec if k in ("uniform", "normal")]
    extra = [k for k in spec if k not in ("uniform", "normal", "range")]
    if len(kinds) != 1 or extra:
        raise UserError(f"{path}: '{key}' needs exactly one of 'uniform' or 'normal' (and optionally 'range'), "
                        f"got keys {sorted(spec)}")
    kind = kinds[0]
    args = spec[kind]
    if not (isinstance(args, list) and len(args) == 2):
        raise UserError(f"{path}: '{key}.{kind}' must be a list of two numbers, got {validate.show(args)}")
    a, b = (validate.number(path, f"{key}.{kind}", v) for v in args)
    if kind == "uniform":
        if "range" in spec:
            raise UserError(f"{path}: '{key}': 'range' goes with 'normal' only")
        if not a < b:
            raise UserError(f"{path}: '{key}.uniform' needs lower < upper, got [{a}, {b}]")
        if not math.isfinite(float(b) - float(a)):
            raise UserError(f"{path}: '{key}.uniform' = [{a}, {b}] is too wide: its width overflows a "
                            "double; narrow the range")
        return Prior("uniform", (float(a), float(b)))
    if not b > 0:
        raise UserError(f"{path}: '{key}.normal' needs a positive standard deviation, got {b}")
    if "range" in spec:
        rng = spec["range"]
        if not (isinstance(rng, list) and len(rng) == 2):
            raise UserError(f"{path}: '{key}.range' must be [lower, upper], got {validate.show(rng)}")
        lo, hi = (validate.number(path, f"{key}.range", v) for v in rng)
        if not lo < hi:
            raise UserError(f"{path}: '{key}.range' needs lower < upper, got [{lo}, {hi}]")
        if not math.isfinite(float(hi) - float(lo)):
            raise UserError(f"{path}: '{key}.range' = [{lo}, {hi}] is too wide: its width overflows a "
                            "double; narrow the range")
        prior = Prior("truncnormal", (float(a), float(b), float(lo), float(hi)))
        log_z = truncnormal_log_mass(*prior.args)
        if not log_z >= math.log(MIN_PRIOR_MASS):
            share = f"e^{log_z:.4g}" if math.isfinite(log_z) else "0"
            raise UserError(f"{path}: '{key}': the range [{lo}, {hi}] holds {share} of the probability of "
                            f"normal = [{a}, {b}] (less than {MIN_PRIOR_MASS:g}): no usable prior mass; "
                            "move the range or the mean")
    else:
        prior = Prior("normal", (float(a), float(b)))
    if not math.isfinite(log_normalisation(prior)):
        raise UserError(f"{path}: '{key}.normal' standard deviation {b} is too large or too small for "
                        "a finite prior density")
    return prior


def _parameter(path, name, table) -> Parameter:
    if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", name):
        raise UserError(f"{path}: parameter name '{name}' must be letters, digits and underscores")
    validate.check_keys(path, f"parameters.{name}", table, PARAM_KEYS)
    tex = validate.text(path, f"parameters.{name}.tex", table.get("tex", name), empty=True, line=True)
    if "value" in table:
        if "analytic" in table:
            raise UserError(f"{path}: 'parameters.{name}' is fixed ('value'); 'analytic' goes with a prior")
        if "prior" in table:
            raise UserError(f"{path}: 'parameters.{name}' has both 'value' (fixed) and 'prior' (sampled)")
        return Parameter(name, None, float(validate.number(path, f"parameters.{name}.value", table["value"])),
                         None, None, tex)
    if "prior" not in table:
        raise UserError(f"{path}: 'parameters.{name}' needs a 'prior' (sampled) or a 'value' (fixed)")
    prior = _prior(path, name, table["prior"])
    if "analytic" in table:
        if not isinstance(table["analytic"], bool):
            raise UserError(f"{path}: 'parameters.{name}.analytic' must be true or false, "
                            f"got {validate.show(table['analytic'])}")
        if table["analytic"]:
            if prior.kind != "normal":
                raise UserError(f"{path}: 'parameters.{name}': analytic = true needs an untruncated normal "
                                "prior (the closed-form integral is over a Gaussian)")
            return Parameter(name, prior, None, None, None, tex, analytic=True)
    lo, hi = support(prior)
    if prior.kind == "uniform":
        mid = 0.5 * (lo + hi) if math.isfinite(lo + hi) else lo + 0.5 * (hi - lo)
        default_guess, default_spread = mid, 0.01 * (hi - lo)
    elif lo < prior.args[0] < hi:
        default_guess, default_spread = prior.args[0], 0.1 * prior.args[1]
    else:                                   # a truncated normal whose mean lies outside its range
        default_guess, default_spread = lo + 0.5 * (hi - lo), min(0.1 * prior.args[1], 0.01 * (hi - lo))
    guess = float(validate.number(path, f"parameters.{name}.guess", table.get("guess", default_guess)))
    spread = float(validate.number(path, f"parameters.{name}.spread", table.get("spread", default_spread),
                           low=0, low_open=True))
    if not lo < guess < hi:
        raise UserError(f"{path}: 'parameters.{name}.guess' = {guess} lies outside the prior support [{lo}, {hi}]")
    # A starting ball much wider than the prior puts most draws outside it, where they are replaced by
    # the guess: walkers would start on one point. Bounded priors: spread ≤ width; normal: ≤ 10 σ.
    widest = (hi - lo) if prior.kind != "normal" else 10.0 * prior.args[1]
    if spread > widest:
        raise UserError(f"{path}: 'parameters.{name}.spread' = {spread:g} is wider than the prior "
                        f"({'its width' if prior.kind != 'normal' else '10 σ'} is {widest:g}); the walkers "
                        "would start on one point")
    return Parameter(name, prior, None, guess, spread, tex)


def support(prior: Prior) -> tuple[float, float]:
    if prior.kind == "uniform":
        return prior.args
    if prior.kind == "truncnormal":
        return prior.args[2], prior.args[3]
    return -math.inf, math.inf


