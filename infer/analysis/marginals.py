"""Marginal constraints of a run: moments, equal-tailed intervals, one-sided limits and the best sample.

Method
------
* Burn-in: `infer.analysis.burnin.choose` (the one rule: 5 × the largest τ of any quantity, at most half
  the run) unless the caller gives a number of steps; the rule used is carried into every table.
* Marginals. Every kept draw of every walker of every ensemble is pooled. Mean and standard deviation
  (``ddof=1``) are the sample moments; the 68 % and 95 % intervals are *equal-tailed*: the 0.16/0.84 and
  0.025/0.975 sample quantiles (``numpy.quantile``, linear interpolation, Hyndman & Fan 1996, Am. Stat. 50,
  361, definition 7).
* Best sample (`best_index`): the kept draw (after burn-in) with the highest ln posterior; not an
  optimised maximum. Tables, the band-power figure and the χ²/PTE line all use this one draw.
* Convergence. R̂ (rank-normalised split R̂), bulk and tail ESS of Vehtari et al. 2021, Bayesian Analysis
  16, 667, and τ, computed by `infer.analysis.diagnostics.all_diagnostics` on the kept draws and judged
  against the run's own ``[stopping]`` targets (`infer.config.Stopping`: R̂ below 1.01, ESS above 1000,
  a run longer than 50 τ — the only defaults). A quantity whose τ fails the τ-multiple rule
  (`burnin.tau_trusted`) has neither a trustworthy τ nor a trustworthy ESS: ``Constraint.trusted`` is
  False and the tables print no number for them.
* One-sided limits. A sampled parameter whose marginal piles up against an edge of its prior support
  (``Samples.bounds``) is reported as a one-sided 95 % limit instead of an interval; see `edge_limit`.

Weighted samples. `infer.analysis.weighted.weighted_constraints` summarises an importance-weighted exact
sample (the surrogate engine) with the same `Constraint` rows and the same code: `marginal` (moments,
intervals, one-sided limit, prior-filling test), `quantile` and `edge_limit` all take optional
normalised weights. The weighted quantile is the weighted generalisation of the definition above (see
`quantile`), so equal weights give the plain numbers.

Assumptions: ensembles are independent chains; walkers of one ensemble are not (see
`diagnostics.all_diagnostics`); draws with a non-finite log-posterior never appear in a chain.
Pure NumPy; nothing here writes files.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from infer.analysis import burnin, diagnostics
from infer.analysis.burnin import default_targets
from infer.analysis.samples import Samples
from infer.errors import UserError

#: A one-sided limit is reported when the edge density is at least this fraction of the peak density.
EDGE_PEAK_RATIO = 0.5
#: Width of the edge strip as a fraction of the prior range (upper bound on the strip width).
EDGE_STRIP = 0.05
#: Asymmetric form when |a − b| exceeds this fraction of (a + b)/2.
ASYMMETRY_THRESHOLD = 0.2


@dataclass
class Constraint:
    """Marginal summary of one sampled or derived quantity (all from the kept, pooled draws)."""

    name: str
    tex: str
    mean: float
    sd: float
    median: float
    lo68: float
    hi68: float
    lo95: float
    hi95: float
    best: float          # value at the best sample (`best_index`)
    rhat: float
    ess_bulk: float
    ess_tail: float
    tau: float
    limit: tuple[str, float] | None = None   # ("upper", q95) or ("lower", q05) when piled on a prior edge
    sampled: bool = True
    trusted: bool = True  # τ obeys the τ-multiple rule, so τ and ESS may be quoted
    # Weighted (importance-sampled) rows only: Monte Carlo standard errors from the weights of "mean",
    # "sd", "median", "lo68", "hi68", "lo95", "hi95", and the effective draws for the mean, sd²/MCSE²
    # (`infer.analysis.weighted`). A weighted row has no R̂, τ or chain ESS (they stay nan).
    mcse: dict | None = None
    ess_weight: float = float("nan")

    @property
    def weighted(self) -> bool:
        return self.mcse is not None

    def flagged(self, rhat_target: float, ess_target: float) -> bool:
        """True when R̂ or either ESS misses its target, or τ and ESS cannot be trusted yet.

        A weighted row is flagged when its effective draws for the mean fall below ``ess_target`` (or are
        undefined); ``rhat_target`` does not apply to it."""
        if self.sd == 0:
            return False                     # a constant has nothing to converge
        if self.weighted:
            return not (np.isfinite(self.ess_weight) and self.ess_weight >= ess_target)
        vals = (self.rhat, self.ess_bulk, self.ess_tail)
        if not self.trusted or not all(np.isfinite(v) for v in vals):
            return True
        return self.rhat > rhat_target or min(self.ess_bulk, self.ess_tail) < ess_target

    @property
    def asymmetric(self) -> bool:
        up, down = self.hi68 - self.median, self.median - self.lo68
        return abs(up - down) > ASYMMETRY_THRESHOLD * 0.5 * (up + down)


def _normalised(x: np.ndarray, weights) -> tuple[np.ndarray, np.ndarray | None]:
    """Flattened ``x`` and, when given, its weights normalised to sum 1 with zero-weight draws removed."""
    x = np.asarray(x, dtype=float).ravel()
    if weights is None:
        return x, None
    w = np.asarray(weights, dtype=float).ravel()
    if w.shape != x.shape:
        raise ValueError(f"{w.size} weights for {x.size} values")
    if np.any(~np.isfinite(w)) or np.any(w < 0):
        raise ValueError("weights must be finite and non-negative")
    keep = w > 0
    if not keep.any():
        raise ValueError("every weight is zero")
    return x[keep], w[keep] / w[keep].sum()


def quantile(x, q, weights=None) -> np.ndarray:
    """Quantiles ``q`` of the draws ``x``, optionally weighted.

    Without weights: ``numpy.quantile`` (linear interpolation, Hyndman & Fan 1996, definition 7). With
    weights w̃ (normalised): the sorted draws x_(i) are placed at the mid-points of their weight,
    c_i = Σ_{j<i} w̃_(j) + w̃_(i)/2, these positions are stretched linearly so that the smallest draw sits at
    0 and the largest at 1, p_i = (c_i − c_1)/(c_n − c_1), and the quantile function interpolates linearly
    between the (p_i, x_(i)). For equal weights p_i = (i − 1)/(n − 1): definition 7 again, so a weighted
    summary with equal weights gives the plain numbers. (`infer.analysis.weights.weighted_quantile` uses
    the unstretched mid-points, Hazen's definition 5; the two differ by O(1/ESS) of a draw spacing.)
    Zero-weight draws are ignored.
    """
    x, w = _normalised(x, weights)
    if w is None:
        return np.quantile(x, q)
    if x.size == 1:
        return np.full(np.shape(q), x[0], dtype=float)
    order = np.argsort(x, kind="stable")
    xs, ws = x[order], w[order]
    c = np.cumsum(ws) - 0.5 * ws
    p = (c - c[0]) / (c[-1] - c[0])
    return np.interp(q, p, xs)


def effective_draws(weights, n: int) -> float:
    """Kish's (Σw)²/Σw² for normalised ``weights`` (None: ``n`` equal draws)."""
    return float(n) if weights is None else float(1.0 / np.sum(np.square(weights)))


def edge_limit(x: np.ndarray, lo: float, hi: float, weights=None) -> tuple[str, float] | None:
    """One-sided 95 % limit of draws ``x`` that pile up on an edge of the prior support [lo, hi].

    Rule (ours, stated in every table): take a strip width h = min(5 % of the prior range,
    (q84 − q16)/4). The posterior density next to an edge is the fraction of draws within h of that
    edge divided by h; the peak density is the largest bin of a histogram of the draws with bins of
    width h laid from the same edge. If the density next to the lower edge is at least half the peak
    density, the marginal is piled on that edge and an upper limit (the 0.95 quantile) is returned;
    symmetrically a lower limit (the 0.05 quantile) for the upper edge. Scaling h by the posterior
    width keeps a narrow peak that merely sits close to an edge (several σ away) from being flagged,
    while a half-normal-like marginal is flagged for any h ≲ σ. If both edges qualify the
    marginal fills the prior, no limit is meaningful and None is returned (the caller marks it as
    prior-dominated).

    ``weights`` (optional, any scale): importance weights of the draws. Fractions of draws become
    fractions of weight, the histogram is weighted, the quantiles are `quantile`'s weighted ones, and the
    minimum of 20 draws applies to Kish's effective number of draws.
    """
    x, w = _normalised(x, weights)
    if effective_draws(w, x.size) < 20 or not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo:
        return None
    q16, q84 = quantile(x, [0.16, 0.84], w)
    h = min(EDGE_STRIP * (hi - lo), (q84 - q16) / 4.0)
    if not h > 0:
        return None

    def piled(edge_dist: np.ndarray) -> bool:
        # edge_dist ≥ 0: distance of each draw from the edge under test
        nbin = min(int(np.ceil(edge_dist.max() / h)) + 1, 100_000)   # far outliers share the last bin
        counts = np.bincount(np.minimum((edge_dist / h).astype(np.int64), nbin - 1), weights=w,
                             minlength=nbin)
        return counts[0] >= EDGE_PEAK_RATIO * counts.max()

    at_lo = piled(np.clip(x - lo, 0.0, None))
    at_hi = piled(np.clip(hi - x, 0.0, None))
    if at_lo and at_hi:
        return None
    if at_lo:
        return ("upper", float(quantile(x, 0.95, w)))
    if at_hi:
        return ("lower", float(quantile(x, 0.05, w)))
    return None


def _fills_prior(x: np.ndarray, lo: float, hi: float, weights=None) -> bool:
    """Both edges carry at least half the peak density (the marginal is as wide as the prior)."""
    if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo:
        return False
    counts = np.histogram(x, bins=int(round(1 / EDGE_STRIP)), range=(lo, hi), weights=weights)[0]
    return bool(counts.max() > 0 and min(counts[0], counts[-1]) >= EDGE_PEAK_RATIO * counts.max())


def marginal(x, bounds: tuple[float, float] | None = None, weights=None) -> dict:
    """The shared summary of one quantity's finite draws ``x`` (optionally weighted): mean, sd, median,
    lo68, hi68, lo95, hi95 (`quantile`), limit (`edge_limit`, when ``bounds`` are given) and fills_prior.

    Without weights: sample mean and sd (ddof = 1). With weights (normalised here): Σ w̃ x and the
    weighted sd with the factor 1/(1 − Σ w̃²) (`infer.analysis.weights.weighted_sd`), which for equal
    weights is the ddof = 1 sd.
    """
    x, w = _normalised(x, weights)
    q = quantile(x, [0.5, 0.16, 0.84, 0.025, 0.975], w)
    if w is None:
        mean = float(np.mean(x))
        sd = float(np.std(x, ddof=1)) if x.size > 1 else float("nan")
    else:
        mean = float(np.dot(w, x))
        s2 = float(np.sum(w * w))
        sd = float(np.sqrt(np.dot(w, (x - mean) ** 2) / (1.0 - s2))) if s2 < 1 else float("nan")
    limit, fills = None, False
    if bounds is not None:
        lo, hi = (float(v) for v in bounds)
        limit = edge_limit(x, lo, hi, w)
        fills = limit is None and _fills_prior(x, lo, hi, w)
    return {"mean": mean, "sd": sd, "median": float(q[0]), "lo68": float(q[1]), "hi68": float(q[2]),
            "lo95": float(q[3]), "hi95": float(q[4]), "limit": limit, "fills_prior": fills}


def best_index(samples: Samples, burn: int) -> tuple[int, int, int]:
    """(step, ensemble, walker) in the full chain of the best sample: the kept draw (steps ≥ ``burn``)
    with the highest ln posterior (the first one in step-major order when several tie)."""
    lp = np.asarray(samples.log_post[burn:], dtype=float)
    if lp.size == 0:
        raise UserError(f"samples: no draws after a burn-in of {burn} steps")
    lp = np.where(np.isfinite(lp), lp, -np.inf)
    step, ens, walk = np.unravel_index(int(np.argmax(lp)), lp.shape)
    return int(step) + int(burn), int(ens), int(walk)


def _check_burn(burn, steps: int) -> int:
    if isinstance(burn, bool) or not isinstance(burn, (int, np.integer, float)) or int(burn) != burn or burn < 0:
        raise UserError(f"burn-in: {burn!r} is not a non-negative whole number of steps")
    return int(burn)


def constraints(samples: Samples, burn: int | burnin.BurnIn | None = None, *, targets=None,
                burn_rule: str | None = None) -> tuple[list[Constraint], dict]:
    """Marginal constraints of every sampled and derived quantity after burn-in.

    ``burn``: None chooses it with `burnin.choose`; a `burnin.BurnIn` is used as is; a whole number is
    taken as given (``burn_rule``, default "given by the caller", says in the tables how it was chosen).
    ``targets``: the run's `infer.config.Stopping` (``rhat_below``, ``ess_above``, ``tau_multiple``);
    None uses its defaults.

    Returns the constraints (sampled first, then derived, in chain order) and an ``info`` dict: burn,
    burn_rule, burn_trusted, tau_max (nan when burn was given), steps (total), steps_kept, ensembles,
    walkers, draws, rhat_target, ess_target, tau_multiple, converged (every non-constant quantity meets
    every target), untrusted (names whose τ/ESS fail the τ-multiple rule), worst (largest R̂, smallest
    trusted ESS), best (step in the full chain, ensemble, walker, log_post, log_like of the best sample),
    prior_dominated (names whose marginal fills the prior), nonfinite ({name: count} left out).
    """
    targets = targets or default_targets()
    if samples.position.ndim != 4:
        raise UserError(f"samples: position must have shape (steps, ensembles, walkers, parameters), "
                        f"got {samples.position.shape}")
    steps, n_ens, n_walk, _ = samples.position.shape
    if steps < 1:
        raise UserError("samples: the chain holds no steps yet")
    if isinstance(burn, burnin.BurnIn):
        choice = burn
    elif burn is None:
        choice = burnin.choose(samples, tau_multiple=targets.tau_multiple)
    else:
        choice = burnin.choose(samples, _check_burn(burn, steps), tau_multiple=targets.tau_multiple,
                               source=burn_rule or "given by the caller")
    burn, rule = choice.burn, choice.rule()
    if burn >= steps:
        raise UserError(f"burn-in: {burn} steps leave nothing of a chain of {steps} steps "
                        f"({rule}); run longer or give a smaller burn-in")
    kept = samples.after(burn)
    names = list(kept.all_names)
    stacked = np.concatenate([kept.position, kept.derived], axis=-1) if kept.derived_names else kept.position
    diag = diagnostics.all_diagnostics(stacked, names)
    ibest = best_index(samples, burn)
    ikept = (ibest[0] - burn,) + ibest[1:]

    cons: list[Constraint] = []
    prior_dominated, nonfinite = [], {}
    for name in names:
        col = kept.column(name)
        x = col.ravel()
        good = np.isfinite(x)
        if not good.all():
            nonfinite[name] = int((~good).sum())
            x = x[good]
        if x.size == 0:
            raise UserError(f"samples: quantity {name!r} has no finite values after burn-in")
        sampled = name in kept.names
        m = marginal(x, kept.bounds.get(name) if sampled else None)
        if m.pop("fills_prior"):
            prior_dominated.append(name)
        d = diag.get(name, {})
        tau = float(d.get("tau", np.nan))
        cons.append(Constraint(
            name=name, tex=kept.label(name), **m,
            best=float(col[ikept]), rhat=float(d.get("rhat", np.nan)), ess_bulk=float(d.get("ess_bulk", np.nan)),
            ess_tail=float(d.get("ess_tail", np.nan)), tau=tau, sampled=sampled,
            trusted=burnin.tau_trusted(steps, tau, targets.tau_multiple)))

    judged = [c for c in cons if c.sd != 0]          # constants have nothing to converge
    rhats = [c.rhat for c in judged]
    esss = [min(c.ess_bulk, c.ess_tail) for c in judged if c.trusted]
    worst = {"rhat_max": float(np.max(rhats)) if rhats else float("nan"),
             "ess_min": float(np.min(esss)) if esss else float("nan")}
    rt, et = float(targets.rhat_below), float(targets.ess_above)
    info = {
        "burn": burn, "burn_rule": rule, "burn_trusted": choice.given or choice.trusted,
        "tau_max": choice.tau_max, "steps": steps, "steps_kept": steps - burn,
        "ensembles": n_ens, "walkers": n_walk, "draws": int((steps - burn) * n_ens * n_walk),
        "rhat_target": rt, "ess_target": et, "tau_multiple": float(targets.tau_multiple),
        "converged": not any(c.flagged(rt, et) for c in judged),
        "untrusted": [c.name for c in judged if not c.trusted],
        "worst": worst, "prior_dominated": prior_dominated, "nonfinite": nonfinite,
        "best": {"step": ibest[0], "ensemble": ibest[1], "walker": ibest[2],
                 "log_post": float(samples.log_post[ibest]), "log_like": float(samples.log_like[ibest])},
    }
    return cons, info


def constraints_as_dicts(cons: list[Constraint]) -> list[dict]:
    """Plain-value form of the constraints (for JSON or tests)."""
    return [asdict(c) for c in cons]
