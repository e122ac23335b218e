"""The report of a Fisher forecast (`infer.forecast.forecast`): its tables, and its comparison with the
sampled posterior of a mock fit.

`posterior_constraints` reads a chain file of either engine with the summary's own rules (the burn-in
rule `infer.analysis.burnin.choose` and `infer.analysis.marginals.constraints` for an ensemble chain; the
importance weights and `infer.analysis.weighted.weighted_constraints` for a surrogate-engine sample), so
the posterior sd compared is the one `infer summarize` reports. `compare` gives Fisher σ / posterior sd
per parameter with the Monte Carlo error of the sd. `text_table` (the terminal) and `markdown`
(forecast.md) label the numbers as the Gaussian approximation they are.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from infer.errors import UserError
from infer.forecast.forecast import LABEL, Forecast


# -- against a sampled posterior -----------------------------------------------------------------------
def posterior_constraints(chain, burn: int | None = None) -> tuple[dict, str, object]:
    """{name: `Constraint`} of the sampled posterior in chain file ``chain`` (either engine), one line
    saying what the sample is, and the sample itself (the kept draws, or the weighted exact draws) — the
    figures `infer summarize` reports (the same burn-in rule, the same weights), without writing anything."""
    from infer.analysis import burnin
    from infer.analysis.marginals import constraints
    from infer.analysis.weighted import WeightedSample, weighted_constraints
    from infer.config import stored as stored_config
    from infer.store.chainfile import ChainStore
    from infer.store.enginefile import EngineFile, engine_of
    if engine_of(chain) == "surrogate":
        if burn is not None:
            raise UserError("--burn applies to ensemble chains; a surrogate-engine sample has no burn-in")
        state = EngineFile(chain).read()
        if state.sample is None:
            raise UserError(f"{chain}: the surrogate engine has not produced a weighted sample yet")
        cfg, s = stored_config(state), state.sample
        ws = WeightedSample(state.names, state.derived_names, s["position"], s["derived"], s["log_post"],
                            s["log_like"], s["log_weight"], dict(state.tex), dict(state.bounds), {})
        cons, info = weighted_constraints(ws, targets=cfg.stopping, khat_max=cfg.surrogate.khat_max)
        what = (f"{chain}: {info['draws']} exact draws importance-weighted to the exact posterior (weight ESS "
                f"{info['ess']:.0f}, k̂ {info['khat']:.2f}{'' if info['weights_ok'] else '; weights NOT trusted'})")
        kept = ws
    else:
        state = ChainStore(chain).read()
        if state.steps_done < 8:
            raise UserError(f"{chain}: only {state.steps_done} steps; too few to compare with")
        if burn is not None and not 0 <= burn < state.steps_done:
            raise UserError(f"--burn must be between 0 and {state.steps_done - 1}, got {burn}")
        cfg = stored_config(state)
        choice = burnin.choose(state.samples, burn, tau_multiple=cfg.stopping.tau_multiple, source="set with --burn")
        cons, info = constraints(state.samples, choice, targets=cfg.stopping)
        what = f"{chain}: {state.steps_done} steps, {choice.burn} discarded as burn-in"
        kept = state.samples.after(choice.burn)
    return {c.name: c for c in cons}, what, kept


@dataclass
class Comparison:
    names: tuple                     # parameters in both
    fisher_sigma: np.ndarray
    posterior_sd: np.ndarray
    posterior_sd_error: np.ndarray   # Monte Carlo error of the sd (nan when unknown)
    what: str
    missing: tuple                   # forecast parameters the chain does not sample

    @property
    def ratio(self) -> np.ndarray:
        return self.fisher_sigma / self.posterior_sd


def _sd_error(c) -> float:
    """Monte Carlo error of a posterior sd: the weights' estimate for a weighted sample, else
    sd/√(2 ESS) (the large-sample error of a Gaussian's sd from ESS independent draws; common practice)."""
    if c.mcse and "sd" in c.mcse:
        return float(c.mcse["sd"])
    ess = min(c.ess_bulk, c.ess_tail)
    return c.sd / math.sqrt(2.0 * ess) if ess > 0 else math.nan


def compare(fc: Forecast, posterior: tuple) -> Comparison:
    """Fisher σ against the posterior sd, per parameter both have; ``posterior`` as returned by
    `posterior_constraints`."""
    cons, what = posterior[:2]
    both = tuple(n for n in fc.names if n in cons)          # sampled there, or derived (the same quantity)
    if not both:
        raise UserError(f"{what.split(': ')[0]}: samples none of the forecast's parameters ({', '.join(fc.names)})")
    sig = dict(zip(fc.names, fc.sigma))
    err = [_sd_error(cons[n]) for n in both]
    return Comparison(both, np.array([sig[n] for n in both]), np.array([cons[n].sd for n in both]),
                      np.array(err, float), what, tuple(n for n in fc.names if n not in both))


def comparison_dict(cmp: Comparison) -> dict:
    return {"chain": cmp.what, "names": list(cmp.names), "fisher_sigma": cmp.fisher_sigma.tolist(),
            "posterior_sd": cmp.posterior_sd.tolist(), "posterior_sd_error": cmp.posterior_sd_error.tolist(),
            "ratio": cmp.ratio.tolist(), "missing": list(cmp.missing)}


# -- tables --------------------------------------------------------------------------------------------
def _g(v: float) -> str:
    return f"{v:.4g}"


def text_table(fc: Forecast, cmp: Comparison | None = None) -> str:
    """The terminal report: label, per-parameter errors, correlations, step check, comparison."""
    f = fc.fisher
    w = max(9, *(len(n) for n in fc.names))
    lines = [LABEL, f"  experiment '{fc.experiment}' ({fc.spec}), run {fc.run}: {fc.n_bands} bands, "
             f"{f.evaluations + 1} exact calls in {fc.seconds:.0f} s; χ² of the model at the fiducial point "
             f"against the fiducial bands {fc.chi2_fiducial:.2g}", ""]
    lines.append(f"  {'parameter':<{w}} {'fiducial':>11} {'σ (marg.)':>11} {'σ (cond.)':>11} {'prior σ':>9}  "
                 f"{'step h':>9} {'Δ(h/2)':>8}")
    for i, n in enumerate(fc.names):
        pp = fc.prior_precision[i]
        lines.append(f"  {n:<{w}} {_g(fc.x0[i]):>11} {_g(fc.sigma[i]):>11} {_g(fc.conditional[i]):>11} "
                     f"{(_g(1 / math.sqrt(pp)) if pp > 0 else 'flat'):>9}  {_g(f.steps[i]):>9} "
                     f"{f.change[i]:>8.1e}{'' if f.converged[i] else ' NOT converged'}")
    if fc.fixed:
        lines.append("  fixed: " + ", ".join(f"{k} = {v:g}" for k, v in fc.fixed.items()))
    lines += ["", "  correlation (Fisher):", "  " + " " * w + "".join(f"{n[:8]:>9}" for n in fc.names)]
    for i, n in enumerate(fc.names):
        lines.append(f"  {n:<{w}}" + "".join(f"{fc.correlation[i, j]:>9.3f}" for j in range(len(fc.names))))
    if cmp is not None:
        lines += ["", f"  against {cmp.what}:", f"  {'parameter':<{w}} {'Fisher σ':>11} {'posterior sd':>13} "
                  f"{'ratio':>7}"]
        for n, s, sd, e, r in zip(cmp.names, cmp.fisher_sigma, cmp.posterior_sd, cmp.posterior_sd_error, cmp.ratio):
            err = f" ± {r * e / sd:.3f}" if np.isfinite(e) else ""
            lines.append(f"  {n:<{w}} {_g(s):>11} {_g(sd):>13} {r:>7.3f}{err}")
        if cmp.missing:
            lines.append("  not in the chain: " + ", ".join(cmp.missing))
    lines += [f"  note: {t}" for t in fc.notes]
    return "\n".join(lines)


def markdown(fc: Forecast, cmp: Comparison | None = None) -> str:
    """forecast.md: the same figures as a Markdown document."""
    f = fc.fisher
    out = [f"# Fisher forecast: {fc.experiment}", "",
           f"*{LABEL}.* Exact for a model linear in the parameters with Gaussian priors; it ignores uniform "
           "prior bounds, skewness and curved degeneracies. Covariance of the bands: Knox (1995) at the "
           "fiducial; Fisher matrix F = ∂mᵀC⁻¹∂m (Tegmark, Taylor & Heavens 1997) by central differences.", "",
           f"Spec `{fc.spec}`, run file `{fc.run}`, {fc.n_bands} bands, {f.evaluations + 1} exact calls, "
           f"χ² of the model at the fiducial against the fiducial bands: {fc.chi2_fiducial:.2g}.", "",
           "| parameter | fiducial | marginalised σ | conditional σ | prior σ | step h | change at h/2 |",
           "|---|---:|---:|---:|---:|---:|---:|"]
    for i, n in enumerate(fc.names):
        pp = fc.prior_precision[i]
        out.append(f"| `{n}` | {_g(fc.x0[i])} | {_g(fc.sigma[i])} | {_g(fc.conditional[i])} | "
                   f"{_g(1 / math.sqrt(pp)) if pp > 0 else 'flat'} | {_g(f.steps[i])} | {f.change[i]:.1e}"
                   f"{'' if f.converged[i] else ' (NOT converged)'} |")
    if fc.fixed:
        out += ["", "Fixed: " + ", ".join(f"`{k}` = {v:g}" for k, v in fc.fixed.items()) + "."]
    out += ["", "Correlation matrix:", "", "| | " + " | ".join(f"`{n}`" for n in fc.names) + " |",
            "|---|" + "---:|" * len(fc.names)]
    for i, n in enumerate(fc.names):
        out.append(f"| `{n}` | " + " | ".join(f"{fc.correlation[i, j]:.3f}" for j in range(len(fc.names))) + " |")
    if cmp is not None:
        out += ["", f"Against the sampled posterior ({cmp.what}):", "",
                "| parameter | Fisher σ | posterior sd | Fisher σ / posterior sd |", "|---|---:|---:|---:|"]
        for n, s, sd, r in zip(cmp.names, cmp.fisher_sigma, cmp.posterior_sd, cmp.ratio):
            out.append(f"| `{n}` | {_g(s)} | {_g(sd)} | {r:.3f} |")
    if fc.notes:
        out += [""] + [f"- {t}" for t in fc.notes]
    return "\n".join(out) + "\n"
