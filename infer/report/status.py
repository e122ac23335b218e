"""``infer status``: progress and convergence of a chain, as plain text (also while it runs).

The figures are those of the stopping rule (`infer.sampling.stopping.assess`) after the one burn-in
rule (`infer.analysis.burnin.choose`). Honesty on short runs: when the run is shorter than the
τ-multiple rule (`burnin.tau_trusted`, the run's ``[stopping] tau_multiple``), τ cannot be measured yet
and the effective sample sizes built on the same autocorrelations are biased high, so neither is
printed as a number, nor is a cost per effective sample; the report says what is missing instead.

A surrogate-engine run (`infer.sampling.engine`) has no walkers to judge: `engine_status_report` shows
its stage, the exact calls so far (by stage), the Kish weight ESS and the Pareto k̂ of the weights
(Vehtari et al. 2024, JMLR 25, 72) against their targets, the surrogate chain's verdict, an ETA when the
caller gives one, and what is still missing.
"""
from __future__ import annotations

import math
import os

import numpy as np

from infer.analysis import burnin
from infer.analysis.diagnostics import acceptance_fraction


def _num(x: float, fmt: str) -> str:
    return format(x, fmt) if math.isfinite(x) else "—"


def status_report(state, cfg, chain_path, params: bool = False, holder: dict | None = None) -> str:
    """The text of ``infer status`` for chain state ``state`` with its stored `Config` ``cfg``.

    ``holder``: the lock record of a process writing the chain (pid, host, started), if any;
    ``params``: add one line per quantity.
    """
    from infer.sampling.stopping import assess
    s = state.samples
    rule = cfg.stopping
    m = float(rule.tau_multiple)
    out = [f"chain     {os.path.abspath(chain_path)}"]
    if holder:
        out.append(f"writer    process {holder.get('pid')} on {holder.get('host')} since {holder.get('started')}")
    out.append(f"run       {state.provenance.get('run_name')}  "
               f"(dataset {os.path.basename(state.provenance.get('dataset_file', ''))})")
    out.append(f"steps     {state.steps_done} of up to {cfg.sampling.steps}  "
               f"({cfg.sampling.ensembles} ensembles × {cfg.sampling.walkers} walkers)")
    if state.steps_done < 8:
        out.append("verdict   too few steps to judge")
        return "\n".join(out)
    E, W = s.position.shape[1:3]
    acc = [acceptance_fraction(s.position[:, e]).mean() for e in range(E)]
    choice = burnin.choose(s, tau_multiple=m)
    v = assess(s, rule, burn=choice.burn)
    trusted = burnin.tau_trusted(v.step, v.tau_max, m)
    out.append(f"accept    {np.mean(acc):.3f}  (per ensemble: {', '.join(f'{a:.3f}' for a in acc)})")
    out.append(f"burn-in   {v.burn} steps ({choice.rule()})")
    out.append(f"R̂ max     {_num(v.rhat_max, '.4f')}   target < {rule.rhat_below}")
    calls = state.steps_done * E * W
    ess = min(v.ess_bulk_min, v.ess_tail_min)
    if trusted:
        out.append(f"ESS min   bulk {v.ess_bulk_min:.0f}, tail {v.ess_tail_min:.0f}   target > {rule.ess_above:.0f}")
        out.append(f"τ max     {v.tau_max:.1f} steps   run length {state.steps_done} vs {m:g} τ = {m * v.tau_max:.0f}")
        out.append(f"cost      {calls} posterior calls; {calls / ess:.1f} calls per effective sample" if ess > 0
                   else f"cost      {calls} posterior calls")
    else:
        out.append(f"ESS min   unreliable: not measurable until τ is   target > {rule.ess_above:.0f}")
        out.append(f"τ max     not yet measurable: the run ({state.steps_done} steps) is shorter than {m:g} τ, "
                   "and on runs this short the estimate is biased low")
        out.append(f"cost      {calls} posterior calls; calls per effective sample not yet measurable")
    out.append(f"verdict   {'targets met' if v.met else 'not converged: ' + '; '.join(honest_missing(v.missing, trusted))}")
    if state.rejections:
        out.append("rejected  " + ", ".join(f"{k} {n}" for k, n in sorted(state.rejections.items())))
    if state.failures:
        out.append(f"crashes   {len(state.failures)} theory-process deaths (points in /run/failures)")
    stop = s.meta.get("stop_reason")
    if stop:
        out.append(f"stopped   {stop}")
    if params:
        out.append(f"\n{'quantity':<16}{'R̂':>9}{'ESS bulk':>12}{'ESS tail':>12}{'τ':>12}")
        for name, d in v.per_param.items():
            if burnin.tau_trusted(v.step, d["tau"], m):
                cells = (_num(d["ess_bulk"], ".0f"), _num(d["ess_tail"], ".0f"), _num(d["tau"], ".1f"))
            else:
                cells = ("unreliable",) * 2 + ("unmeasured",)
            out.append(f"{name:<16}{_num(d['rhat'], '.4f'):>9}{cells[0]:>12}{cells[1]:>12}{cells[2]:>12}")
    return "\n".join(out)


def honest_missing(missing: list[str], trusted: bool) -> list[str]:
    """The stopping rule's unmet targets (`Verdict.missing`), without τ/ESS numbers when τ fails the
    τ-multiple rule (``trusted`` False): those items are replaced by what is not measurable yet."""
    if trusted:
        return missing
    out = []
    for item in missing:
        if item.startswith("ESS "):
            out.append("ESS not yet measurable")
        elif item.startswith("steps ") and "τ" in item:
            out.append("run shorter than the τ-multiple rule")
        else:
            out.append(item)
    return out


# -- the surrogate engine ------------------------------------------------------------------------------

#: What each engine stage is doing, in words.
ENGINE_STAGES = {"fit": "best fit (Laplace approximation)", "design": "exact calls at the surrogate's design points",
                 "train": "training the surrogate", "chain": "sampling the surrogate posterior",
                 "correct": "exact calls at correction draws", "weights": "weighing the correction draws",
                 "done": "finished"}


def _duration(seconds: float) -> str:
    seconds = max(0.0, float(seconds))
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def engine_status_report(info: dict) -> str:
    """The text of ``infer status`` for a surrogate-engine run, from its record ``info``.

    ``info`` is `infer.analysis.weighted.engine_info` of a finished run, or the same keys as far as a
    running one knows them (every key but ``stage`` optional): stage, exact_calls, calls_by_stage,
    theory_calls, ess, ess_target, khat, khat_max, refits, rounds, chain, ln_z, ln_z_err, eta_seconds,
    converged, missing. Figures not yet known are said to be so, never printed as numbers.
    """
    stage = str(info.get("stage", "unknown"))
    f = lambda key: float(info[key]) if info.get(key) is not None and math.isfinite(float(info[key])) else math.nan
    out = ["engine    surrogate + importance correction to the exact posterior"]
    out.append(f"stage     {stage}: {ENGINE_STAGES.get(stage, 'unknown stage')}")
    calls = info.get("exact_calls")
    if calls is not None:
        line = f"exact     {int(calls):,} calls so far"
        by = info.get("calls_by_stage") or {}
        if by:
            line += (f" (fit {int(by.get('fit', 0)):,}, design {int(by.get('design', 0)):,}, "
                     f"correction {int(by.get('correct', 0)):,})")
        if info.get("theory_calls") is not None and int(info["theory_calls"]) != int(calls):
            line += f"; {int(info['theory_calls']):,} reached the theory code"
        out.append(line)
    ess, target = f("ess"), f("ess_target")
    khat, kmax = f("khat"), f("khat_max")
    kmax = 0.7 if not math.isfinite(kmax) else kmax
    tgt = f"   target ≥ {target:.0f}" if math.isfinite(target) else ""
    if math.isfinite(ess):
        per = f"; {int(calls) / ess:.2f} exact calls per effective sample" if calls and ess > 0 else ""
        out.append(f"weights   Kish ESS {ess:,.0f}{tgt}{per}")
    else:
        out.append(f"weights   Kish ESS not yet known (no correction round done){tgt}")
    if math.isfinite(khat):
        out.append(f"k̂         {khat:.2f}   must stay < {kmax:g} (Vehtari et al. 2024, JMLR 25, 72)")
    else:
        out.append(f"k̂         not yet measurable   must stay < {kmax:g}")
    rounds = info.get("rounds") or []
    if info.get("refits") is not None or rounds:
        line = f"surrogate refined {int(info.get('refits') or 0)} time(s), {len(rounds)} correction round(s)"
        if rounds:
            r = rounds[-1]
            line += (f"; last round |Δ ln p| RMS {_num(float(r['heldout_rms']), '.3g')}, "
                     f"worst {_num(float(r['heldout_worst']), '.3g')} (held out)")
        out.append(line)
    ch = info.get("chain") or {}
    if ch:
        out.append(f"chain     surrogate chain R̂ max {_num(float(ch.get('rhat_max', math.nan)), '.4f')}, "
                   f"ESS min {_num(float(ch.get('ess_min', math.nan)), '.0f')}"
                   f" ({'converged' if ch.get('met') else 'not converged'})")
    if info.get("ln_z") is not None and math.isfinite(f("ln_z")):
        out.append(f"ln Z      {f('ln_z'):.3f} ± {f('ln_z_err'):.3f}")
    eta = f("eta_seconds")
    if math.isfinite(eta) and stage != "done":
        out.append(f"ETA       about {_duration(eta)} to the targets")
    missing = [str(m) for m in info.get("missing") or []]
    # the weights' part of the stopping rule, checked on the figures shown (a record is not believed
    # when it calls a run converged that they contradict)
    weights_short = []
    if not (math.isfinite(ess) and math.isfinite(target) and ess >= target):
        weights_short.append(f"weight ESS {ess:.0f} < {target:.0f}" if math.isfinite(ess) and math.isfinite(target)
                             else "weight ESS not yet known")
    if not (math.isfinite(khat) and khat < kmax):
        weights_short.append(f"k̂ {khat:.2f} ≥ {kmax:g}" if math.isfinite(khat) else "k̂ not yet measurable")
    if info.get("converged") and not weights_short:
        out.append("verdict   targets met: surrogate chain converged, weight ESS ≥ target, k̂ below the bound")
        return "\n".join(out)
    todo = missing + [m for m in weights_short if not any(x.split()[0:2] == m.split()[0:2] for x in missing)]
    if not ch.get("met") and not any("chain" in m for m in todo):
        todo.append("surrogate chain not converged" if ch else "surrogate chain not run yet")
    if stage == "done":
        out.append("verdict   NOT converged: " + ("; ".join(todo) if todo else "stopped before its targets"))
    else:
        out.append("verdict   running, not converged yet: " + "; ".join(todo or ["targets not yet checked"]))
    return "\n".join(out)


def engine_record(state, cfg) -> dict:
    """`engine_status_report`'s record of a surrogate-engine chain file (`infer.store.enginefile`): the
    stored report of the last session's result when there is one, else what the exact calls tell."""
    from types import SimpleNamespace

    from infer.analysis.weighted import engine_info
    from infer.sampling.engine import Round
    from infer.sampling.exactlog import STAGES
    rep = state.report
    if rep is None:
        stage = np.asarray(state.rows.stage)
        last = {v: k for k, v in STAGES.items()}.get(int(stage[-1]), "start") if len(stage) else "start"
        prog = state.progress or {}
        out = {"stage": prog.get("stage", last), "exact_calls": state.calls_done,
               "calls_by_stage": {k: int(np.sum(stage == c)) for k, c in STAGES.items()},
               "ess_target": float(cfg.stopping.ess_above), "khat_max": float(cfg.surrogate.khat_max),
               "converged": False, "missing": ["the run has not produced a weighted sample yet"]}
        for key in ("ess", "khat", "eta_seconds", "chain"):
            if prog.get(key) is not None:
                out[key] = prog[key]
        return out
    result = SimpleNamespace(
        rounds=[Round(**r) for r in rep["rounds"]], exact_calls=rep["exact_calls"], theory_calls=rep["theory_calls"],
        refits=rep["refits"], chain=rep["surrogate_chain"], ess=rep["ess"], khat=rep["khat"], ln_z=rep["ln_z"],
        ln_z_err=rep["ln_z_err"], converged=rep["converged"], missing=rep["missing"],
        log_weight=state.sample["log_weight"], laplace=SimpleNamespace(calls=rep.get("fit_calls", 0)),
        stage="done")
    return engine_info(result, ess_target=rep["ess_target"], khat_max=rep["khat_max"], exact_rows=state.rows)


def status_of_file(path, params: bool = False) -> str:
    """``infer status``: the text for the chain file at ``path``, of either engine (read-only, safe while
    another process writes it)."""
    import os

    from infer.config import stored as stored_config
    from infer.store.chainfile import ChainStore
    from infer.store.enginefile import EngineFile, engine_of
    from infer.store.lock import is_locked, read_holder
    if engine_of(path) == "surrogate":
        state = EngineFile(path).read()
        return f"chain     {os.path.abspath(path)}\n" + engine_status_report(engine_record(state, stored_config(state)))
    state = ChainStore(path).read()
    holder = read_holder(path) if is_locked(path) else {}
    return status_report(state, stored_config(state), path, params=params, holder=holder)
