"""The stopping rule: is the evidence of convergence in?

A chain meets the rule when, after automatic burn-in removal (`infer.analysis.burnin.choose`, the one home
of the burn-in rule: 5 × the largest integrated autocorrelation time), for every sampled and derived quantity:
  * the rank-normalised split-R̂ (Vehtari et al. 2021, Bayesian Analysis 16, 667) between the independent
    ensembles is below ``rhat_below`` (default 1.01, the paper's recommendation);
  * bulk and tail effective sample sizes (same paper) exceed ``ess_above``;
  * the run is longer than ``tau_multiple`` × the largest τ_int (default 50, the rule of thumb of
    Foreman-Mackey et al. 2013, PASP 125, 306 for trusting the τ estimate itself; `burnin.tau_trusted`);
  * at least ``min_steps`` steps were taken.
For long chains the figures are computed on the kept steps thinned to at most `MAX_STEPS` (every k-th
step; τ is then rescaled by k). Thinning by less than τ loses almost no information (ESS is nearly
unchanged), and it bounds the cost of a check, which otherwise grows with the run.
`assess` returns every figure so that progress lines, `infer status` and the chain file can show why a
run stopped or what it still lacks; `eta_steps` extrapolates the remaining steps from ESS ∝ kept steps.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np

from infer.analysis import burnin, diagnostics
from infer.analysis.samples import Samples


MAX_STEPS = burnin.MAX_STEPS


@dataclass
class Verdict:
    step: int
    burn: int
    rhat_max: float
    ess_bulk_min: float
    ess_tail_min: float
    tau_max: float
    met: bool
    missing: list[str] = field(default_factory=list)    # human-readable unmet targets
    per_param: dict = field(default_factory=dict)

    def row(self) -> dict:
        d = asdict(self)
        return {k: float(d[k]) for k in ("step", "rhat_max", "ess_bulk_min", "ess_tail_min", "tau_max", "met")}


def _diagnostics(columns, rows: slice) -> dict[str, dict[str, float]]:
    """`diagnostics.all_diagnostics` of each (steps, E, W) column view over ``rows`` (no copy of the chain)."""
    return {name: diagnostics.all_diagnostics(col[rows, ..., None], [name])[name] for name, col in columns}


def assess(samples: Samples, rule, burn: int | None = None) -> Verdict:
    """Diagnostics of ``samples`` against a `config.Stopping` rule (``burn`` None: automatic).

    Works on views of ``samples``' arrays, one quantity at a time, so a check never copies the chain."""
    T = samples.steps
    if T < 8:
        return Verdict(T, 0, math.inf, 0.0, 0.0, math.nan, False, ["too few steps to judge"])
    columns = ([(n, samples.position[..., i]) for i, n in enumerate(samples.names)] +
               [(n, samples.derived[..., i]) for i, n in enumerate(samples.derived_names)])
    columns = [(n, c) for n, c in columns if np.isfinite(c).all()]
    if burn is None:
        burn = burnin.choose(samples, tau_multiple=rule.tau_multiple, max_steps=MAX_STEPS).burn
    thin = max(1, (T - burn) // MAX_STEPS)
    per = _diagnostics(columns, slice(burn, None, thin))
    if thin > 1:
        for d in per.values():
            d["tau"] *= thin
    rhat = max(d["rhat"] for d in per.values())
    eb = min(d["ess_bulk"] for d in per.values())
    et = min(d["ess_tail"] for d in per.values())
    tau = max(d["tau"] for d in per.values())
    missing = []
    if not rhat < rule.rhat_below:
        missing.append(f"R̂ {rhat:.3f} ≥ {rule.rhat_below}")
    if not min(eb, et) > rule.ess_above:
        missing.append(f"ESS {min(eb, et):.0f} ≤ {rule.ess_above:.0f}")
    if not burnin.tau_trusted(T, tau, rule.tau_multiple):
        missing.append(f"steps {T} ≤ {rule.tau_multiple:g}τ = {rule.tau_multiple * tau:.0f}")
    if T < rule.min_steps:
        missing.append(f"steps {T} < min_steps {rule.min_steps}")
    _nan_to_inf = (lambda x: x if math.isfinite(x) else math.inf)
    return Verdict(T, burn, _nan_to_inf(rhat), float(np.nan_to_num(eb)), float(np.nan_to_num(et)),
                   _nan_to_inf(tau), not missing, missing, per)


def eta_steps(v: Verdict, rule) -> float:
    """Steps still needed, extrapolated: ESS grows ∝ kept steps, and the run must exceed tau_multiple·τ."""
    if v.met:
        return 0.0
    kept = max(1, v.step - v.burn)
    ess = min(v.ess_bulk_min, v.ess_tail_min)
    need = 0.0
    if ess > 0:
        need = max(need, kept * (rule.ess_above / ess) - kept)
    else:
        return math.inf
    if math.isfinite(v.tau_max):
        need = max(need, rule.tau_multiple * v.tau_max - v.step)
    return max(need, rule.min_steps - v.step, 0.0)
