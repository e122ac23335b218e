"""A run of the surrogate engine from a run file: the chain file, the evaluators, signals and the result.

The glue between the run file (``[sampling] engine = "surrogate"``, ``[surrogate]``), the run's posterior
as the engine sees it (`infer.model.emulated`), the engine itself (`infer.sampling.engine`), the replay log
of exact calls (`infer.sampling.exactlog`) and its chain file (`infer.store.enginefile`). What it adds is
what a days-long job needs, as the ensemble driver does for a plain run:

* every exact call is committed to the chain file as its batch completes, so ``kill -9`` loses at most
  one batch, and ``infer resume`` re-runs the deterministic engine over the stored calls — the final
  weighted sample is identical value for value to an uninterrupted run's;
* SIGTERM/SIGINT and the wall-time budget stop the run between points (the evaluators poll the flag; an
  isolated worker is killed mid-call), the committed calls stay, and the command exits 75;
* a progress line per ``[sampling] log_minutes`` in batch jobs (stage, exact calls, weight ESS, k̂).

The weighted sample and its report are written into the chain file whenever a session ends with a
result (converged, or out of budget); `infer.report` summarises them.
"""
from __future__ import annotations

import logging
import math
import signal
import time

import numpy as np

from infer.errors import EXIT_OK, EXIT_PAUSED, UserError
from infer.sampling.exactlog import STAGES

log = logging.getLogger("infer")


class _Stop:
    """SIGTERM/SIGINT and the wall-time budget as one flag that evaluators poll."""

    def __init__(self, early=None, deadline: float | None = None):
        self.signal = getattr(early, "signal", None)
        self.deadline = deadline
        self.time_up = False
        self.evaluator = None

    def __call__(self) -> bool:
        if self.signal is not None:
            return True
        if self.deadline is not None and time.monotonic() > self.deadline:
            self.time_up = True
            return True
        return False

    def handler(self, signum, frame):
        from infer.parallel import Interrupted
        self.signal = signal.Signals(signum).name
        if getattr(self.evaluator, "busy", False):       # inside an in-process call: abandon it
            raise Interrupted

    def __enter__(self):
        self._old = {s: signal.signal(s, self.handler) for s in (signal.SIGTERM, signal.SIGINT)}
        return self

    def __exit__(self, *exc):
        for s, h in self._old.items():
            signal.signal(s, h)

    @property
    def reason(self) -> str:
        return "time-limit" if self.time_up and self.signal is None else f"signal {self.signal}"


class _Progress:
    """One log line per interval (and at every stage change): stage, exact calls, weight ESS, k̂."""

    def __init__(self, log_minutes: float, target: float, store=None):
        self.every, self.target = 60.0 * log_minutes, target
        self.last = time.monotonic()
        self.state = {"stage": "start", "calls": 0}
        self.t0 = time.monotonic()
        self.first_calls = None
        self.store = store                  # gets `record()` with each commit, for `infer status`

    def record(self) -> dict:
        """Stage, exact calls, weight ESS and k̂ so far, and an ETA from the correction rounds' ESS per
        call and this session's seconds per exact call."""
        st = dict(self.state)
        out = {k: _plain(st[k]) for k in ("stage", "calls", "ess", "khat", "chain") if k in st}
        done = st.get("calls", 0) - (self.first_calls or 0)
        per_call = (time.monotonic() - self.t0) / done if done > 0 else None
        if st.get("ess") and st.get("correct_calls") and per_call is not None:
            rate = st["ess"] / st["correct_calls"]
            out["eta_seconds"] = max(0.0, (self.target - st["ess"]) / max(rate, 1e-3) * per_call)
        out["seconds_per_call"] = per_call
        return out

    def stage(self, stage, **kw):
        changed = stage != self.state.get("stage")
        self.state.update(kw, stage=stage)
        if changed and stage != "weights" and not (stage == "correct" and kw.get("round", 0) > 0):
            log.info("surrogate engine: %s", _describe(stage, self.state))
        if stage == "correct" and "round" in kw:
            self.state.setdefault("correct_start", kw.get("calls", 0))
        if stage == "weights":
            self.state["correct_calls"] = kw.get("calls", 0) - self.state.get("correct_start", 0) + 0

            log.info("surrogate engine: %d exact calls, weight ESS %.0f of %.0f, k̂ %.2f", kw.get("calls", 0),
                     kw.get("ess", 0), self.target, kw.get("khat", math.nan))

    def calls(self, n):
        if self.first_calls is None:
            self.first_calls = n - 1
        self.state["calls"] = n
        if self.store is not None:
            self.store.progress = self.record()
        if time.monotonic() - self.last >= self.every:
            self.last = time.monotonic()
            log.info("surrogate engine: %s, %d exact calls so far (%.0f s)", self.state["stage"], n,
                     time.monotonic() - self.t0)


def _describe(stage, st):
    return {"fit": "best fit (Levenberg–Marquardt on the whitened residuals)",
            "design": "exact calls at the space-filling design around the best fit",
            "train": f"training the surrogate on {st.get('points', '?')} exact points",
            "chain": "sampling the surrogate posterior",
            "correct": "exact calls at surrogate-posterior draws (importance correction)"}.get(stage, stage)


def problem_for(cfg):
    from infer.model.emulated import EmulatedProblem
    s = cfg.surrogate
    return EmulatedProblem(cfg, surrogate_options={"method": s.method}, fit_starts=s.fit_starts)


def chain_sampler_for(cfg, problem, should_stop=None):
    """The surrogate chain: the plain run's driver on the surrogate posterior, polling ``should_stop``."""
    from infer.sampling.surrogate_chain import sample_surrogate

    def sample(logpost, laplace, seed, need):
        # The surrogate chain's own rule (R̂ < 1.01, > 50 τ, ESS ≥ the draws it must provide) is fixed, not the
        # run's [stopping]: a resume with another weight-ESS target must repeat the same chains.
        return sample_surrogate(logpost, laplace, seed, need, lower=problem.lower, upper=problem.upper,
                                ensembles=max(2, cfg.sampling.ensembles), should_stop=should_stop,
                                log_minutes=cfg.sampling.log_minutes)
    return sample


def execute(cfg, store, problem, *, early=None, clock=None, start_event=None) -> int:
    """Run (or continue) the engine over ``store``'s exact calls; write the weighted sample when done.
    Returns the exit code (0 finished, 75 paused)."""
    from infer.parallel import Interrupted, make_evaluator
    from infer.sampling.driver import event
    from infer.sampling.engine import Engine
    from infer.sampling.exactlog import ExactLog
    limit = cfg.stopping.time_limit
    deadline = (clock if clock is not None else time.monotonic()) + limit - 5.0 if limit else None
    progress = _Progress(cfg.sampling.log_minutes, cfg.stopping.ess_above, store)
    with _Stop(early, deadline) as stop:
        evaluator = None
        try:
            evaluator = make_evaluator(problem.factory, cfg.sampling.workers, cfg.sampling.threads_per_worker,
                                       should_stop=stop, built=problem.model)
            stop.evaluator = evaluator
            exact = ExactLog(evaluator, store, batch=cfg.surrogate.batch, on_batch=progress.calls)
            stored = len(store.rows())
            if start_event is not None:
                store.append(type(store.rows()).empty(len(problem.names), len(problem.model.blob_names)),
                             events=[start_event])
            if stored:
                log.info("surrogate engine: %d exact calls are in the chain file and are replayed", stored)
            engine = Engine(problem, exact, cfg.surrogate, cfg.stopping.ess_above, cfg.seed,
                            chain_sampler_for(cfg, problem, stop), report=progress.stage)
            t0 = time.monotonic()
            result = engine.run()
        except Interrupted:
            log.info("paused after %d exact calls (%s); they are in %s; continue with `infer resume %s`",
                     len(store.rows()), stop.reason, store.path, store.path)
            store.append(type(store.rows()).empty(len(problem.names), len(problem.model.blob_names)),
                         events=[event("stop", calls=len(store.rows()), reason=stop.reason)])
            return EXIT_PAUSED
        finally:
            if evaluator is not None:
                evaluator.close()
        reason = "converged" if result.converged else "not-converged"
        sample, report = sample_and_report(problem, result, cfg, time.monotonic() - t0)
        store.write_sample(sample, report, reason, events=[event("stop", calls=result.exact_calls, reason=reason)])
    if result.converged:
        log.info("converged: weight ESS %.0f ≥ %.0f, k̂ %.2f, from %d exact calls (%.2f per effective sample)",
                 result.ess, cfg.stopping.ess_above, result.khat, result.theory_calls,
                 result.calls_per_effective_sample)
    else:
        log.info("stopped WITHOUT meeting the targets (%s) after %d exact calls; the weighted sample is not "
                 "converged — raise [surrogate] max_exact and `infer resume %s`", "; ".join(result.missing),
                 result.exact_calls, store.path)
    return EXIT_OK


def sample_and_report(problem, result, cfg, seconds: float):
    """The weighted sample (chain vocabulary: ln L, derived … χ²) and a plain-value report of the run."""
    log_like, derived = problem.chain_blobs(result.position, result.log_post, result.blobs)
    sample = {"position": result.position, "log_post": result.log_post, "log_like": log_like,
              "derived": derived, "log_weight": result.log_weight}
    stages = {name: int(np.sum(problem_stage == code)) for name, code in STAGES.items()} \
        if (problem_stage := getattr(result, "stages", None)) is not None else {}
    sur = problem.surrogate.describe() if problem.surrogate is not None else {}
    last = result.rounds[-1] if result.rounds else None
    report = {
        "engine": "surrogate", "converged": bool(result.converged), "missing": list(result.missing),
        "ess": float(result.ess), "ess_target": float(cfg.stopping.ess_above), "khat": float(result.khat),
        "khat_max": float(cfg.surrogate.khat_max), "ln_z": float(result.ln_z), "ln_z_err": float(result.ln_z_err),
        "exact_calls": int(result.exact_calls), "theory_calls": int(result.theory_calls),
        "calls_per_effective_sample": float(result.calls_per_effective_sample),
        "fit_calls": int(result.laplace.calls), "refits": int(result.refits),
        "rounds": [vars(r) for r in result.rounds],
        "surrogate": _plain(sur), "surrogate_chain": _plain(result.chain),
        "heldout_rms_dlnp": float(last.heldout_rms) if last else math.nan,
        "heldout_worst_dlnp": float(last.heldout_worst) if last else math.nan,
        "laplace_mean": result.laplace.mean.tolist(), "laplace_cov": result.laplace.cov.tolist(),
        "laplace": _plain(result.laplace.info), "seconds": float(seconds), "stages": stages,
    }
    return sample, report


def _plain(x):
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, np.ndarray):
        return x.tolist()
    return x


def create(cfg, store, problem):
    """A new engine chain file for ``cfg`` (metadata and provenance; no exact call yet)."""
    from infer.model import provenance
    post = problem.model.posterior
    store.create(names=problem.names, blob_names=problem.model.blob_names, derived_names=problem.derived_names,
                 tex=post.labels(), bounds=post.priors.bounds, provenance=provenance.record(cfg, post))




def start(cfg, chain, replace_existing: bool, clock) -> int:
    """``infer run`` with ``[sampling] engine = "surrogate"``: a new engine chain file, then `execute`."""
    from infer.run import EarlySignals, set_aside
    from infer.sampling.driver import event
    from infer.store.enginefile import EngineFile
    from infer.store.lock import ChainLock
    problem = problem_for(cfg)                       # validates dataset, theory and parameters first
    log.info("run '%s' with the surrogate engine: %d sampled parameters (%d emulated), %d bands (%s), "
             "weight-ESS target %.0f", cfg.name, len(problem.names), len(problem.theory_index), problem.n_bands,
             "/".join(problem.like.kinds), cfg.stopping.ess_above)
    with EarlySignals() as early, ChainLock(str(chain)):
        store = EngineFile(str(chain))
        store.remove_strays()
        set_aside(chain, replace_existing)
        create(cfg, store, problem)
        log.info("chain file: %s", chain)
        return execute(cfg, store, problem, early=early, clock=clock,
                       start_event=event("start", calls=0, workers=cfg.sampling.workers))


def resume(chain, config_path, override, extra_changes, clock, summary_check=None) -> int:
    """``infer resume`` of an engine chain: the engine re-runs over the stored exact calls (replayed) and
    computes the rest; a converged run with no change is left alone."""
    from infer.run import check_blobs, check_dataset, resuming
    from infer.sampling.driver import event
    from infer.store.enginefile import EngineFile
    if any(c.startswith("--steps") for c in extra_changes):
        raise UserError("--steps applies to ensemble runs; a surrogate-engine run is bounded by "
                        "[surrogate] max_exact (give a run file with a larger one via --config)")
    with resuming(chain, EngineFile, config_path, override, extra_changes, summary_check) as (
            early, store, state, cfg, changes):
        problem = problem_for(cfg)
        check_dataset(state, problem.model.posterior.data, cfg, chain)
        check_blobs(state.derived_names, problem, chain)
        if tuple(state.blob_names) != tuple(problem.model.blob_names):
            raise UserError(f"refusing to resume {chain}: its exact calls record "
                            f"{state.blob_names[0] if state.blob_names else 'nothing'}… where this version "
                            f"records {problem.model.blob_names[0]}… (an earlier version of infer stored model "
                            "band powers; this one stores the binned theory); start a new chain")
        if state.report is not None and state.report.get("converged") and not changes:
            log.info("%s has converged already (weight ESS %.0f, k̂ %.2f); nothing to do", chain,
                     state.report["ess"], state.report["khat"])
            return EXIT_OK
        log.info("resuming %s after %d exact calls%s", chain, state.calls_done,
                 f" (changes: {'; '.join(changes)})" if changes else "")
        return execute(cfg, store, problem, early=early, clock=clock,
                       start_event=event("resume", calls=state.calls_done, changes=changes))
