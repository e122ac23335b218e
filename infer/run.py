"""Starting and resuming a run from its run file: lock, signals at start-up, engine dispatch, the report.

What `infer run` and `infer resume` do between parsing the command line and printing, as library
functions the tests call too: hold the chain's lock (`infer.store.lock`), set an existing chain aside on
``--replace`` (renamed, never deleted, and only ever an infer chain), build the posterior and its
evaluator (`infer.parallel`), write the new chain file with its provenance, and hand over to the engine —
the ensemble driver (`infer.sampling.driver`) or the surrogate engine (`infer.surrogate_run`). A resume
re-reads the run file stored in the chain, refuses any change to the posterior or the sampler
(`infer.config.diff`) and a changed dataset (SHA-256), and continues exactly.

A SIGTERM/SIGINT before the driver takes over (start-up, starting ball, worker start) is remembered by
`EarlySignals`, so evaluators abandon their work and the command exits 75 like a paused run.
"""
from __future__ import annotations

import logging
import os
import signal
import time
from contextlib import contextmanager
from dataclasses import replace
from pathlib import Path

from infer import paths
from infer.errors import EXIT_OK, EXIT_PAUSED, UserError

log = logging.getLogger("infer")


class EarlySignals:
    """SIGTERM/SIGINT before the driver takes over: remembered, and polled by the evaluators."""

    def __init__(self):
        self.signal: str | None = None

    def __enter__(self):
        self._old = {s: signal.signal(s, self._handler) for s in (signal.SIGTERM, signal.SIGINT)}
        return self

    def _handler(self, signum, frame):
        self.signal = signal.Signals(signum).name

    def is_set(self) -> bool:
        return self.signal is not None

    def __exit__(self, *exc):
        for s, h in self._old.items():
            signal.signal(s, h)


def cap_threads(cfg):
    """Before the theory code is first loaded in this process (see `infer.parallel.cap_in_process_threads`)."""
    from infer.parallel import cap_in_process_threads
    cap_in_process_threads(cfg.sampling.workers, cfg.sampling.threads_per_worker)


def make_evaluator(cfg, posterior, early=None):
    """The run's evaluator: the posterior's factory on MPI ranks, worker processes or (workers = 0) the
    already built ``posterior`` in this process."""
    from infer.model.posterior import PosteriorFactory
    from infer.parallel import make_evaluator as build, never
    stop = early.is_set if early is not None else never
    return build(PosteriorFactory(cfg), cfg.sampling.workers, cfg.sampling.threads_per_worker, should_stop=stop,
                 built=posterior, points_per_call=cfg.sampling.walkers // 2)


def check_can_set_aside(chain: Path):
    """``--replace`` renames an existing chain file: only ever a file that is an infer chain."""
    from infer.store.chainfile import FORMAT
    paths.replaceable(chain, FORMAT, "chain", "sets aside")


def set_aside(chain: Path, replace_existing: bool) -> None:
    """An existing chain at the path: refused, or with ``--replace`` renamed (never deleted)."""
    if chain.exists():
        if not replace_existing:
            raise UserError(f"{chain} already exists: continue it with `infer resume {chain}`, or pass "
                            "--replace to set it aside (it is renamed, never deleted)")
        check_can_set_aside(chain)
        aside = chain.with_name(chain.name + time.strftime(".replaced-%Y%m%d-%H%M%S"))
        os.replace(chain, aside)
        log.info("set the existing chain aside as %s", aside)


def stored_config(state):
    """The run file stored in a chain's provenance, parsed again (`infer.config.stored`)."""
    from infer import config
    return config.stored(state)


def report_outcome(outcome, chain_path, tau_multiple: float = 50.0):
    v = outcome.verdict
    if outcome.code == EXIT_PAUSED:
        log.info("paused after %d steps (%s); checkpoint written to %s; continue with `infer resume %s`",
                 outcome.steps, outcome.reason, chain_path, chain_path)
    elif outcome.reason == "converged":
        log.info("converged after %d steps: every stopping target met (R̂max %.4f, ESS min %.0f)",
                 outcome.steps, v.rhat_max, min(v.ess_bulk_min, v.ess_tail_min))
    else:
        if v is not None:
            from infer.analysis import burnin
            from infer.report.status import honest_missing
            why = "; ".join(honest_missing(v.missing, burnin.tau_trusted(v.step, v.tau_max, tau_multiple)))
        else:
            why = "no convergence check was reached"
        log.info("reached the requested %d steps WITHOUT meeting the stopping targets (%s); the chain is "
                 "not converged — extend it with `infer resume %s --steps N`", outcome.steps, why, chain_path)


def paused_before_start(early, what):
    log.info("stopped by %s %s; the chain is unchanged (exit 75: run the same command again)",
             early.signal or "a signal", what)
    return EXIT_PAUSED


def drive(cfg, store, evaluator, state, start_event, clock, early):
    """The ensemble driver from ``state`` to the run's length or its stopping rule; the exit code."""
    from infer.sampling.driver import Driver
    driver = Driver(cfg, store, evaluator, state)
    driver.stop_requested = early.signal           # a signal during start-up pauses at once
    outcome = driver.run(cfg.sampling.steps, cfg.stopping.time_limit, clock, start_event)
    report_outcome(outcome, store.path, cfg.stopping.tau_multiple)
    if driver.rejections:
        log.info("points given ln p = -inf, by reason: %s",
                 ", ".join(f"{k} {v}" for k, v in sorted(driver.rejections.items())))
    return outcome.code


def resumed_config(state, chain: Path, config_path, override, extra_changes):
    """The configuration a resume continues with: the stored run file, or ``config_path``'s when it
    changes run-control settings only, with ``override(cfg)`` (command-line values) applied; returns
    (cfg, list of changes for the event log)."""
    from infer import config
    old = stored_config(state)
    cfg, changes = old, []
    if config_path:
        new = config.load(config_path)
        refused, changes = config.diff(old, new)
        if refused:
            raise UserError(f"refusing to resume {chain} with {config_path}: it changes the posterior or the "
                            f"sampler ({'; '.join(refused)}); start a new chain instead")
        cfg = new
    cfg = override(replace(cfg, chain_path=str(chain), summary_dir=old.summary_dir))
    return cfg, list(changes) + list(extra_changes)


@contextmanager
def resuming(chain: Path, store_class, config_path, override, extra_changes, summary_check=None):
    """Hold the chain's lock and start-up signals, read the chain, settle the configuration a resume
    continues with and cap this process's threads; yields (early signals, store, state, cfg, changes)."""
    from infer.store.lock import ChainLock
    with EarlySignals() as early, ChainLock(str(chain)):
        store = store_class(str(chain))
        store.remove_strays()
        state = store.read()
        cfg, changes = resumed_config(state, chain, config_path, override, extra_changes)
        check_moves_version(chain, cfg)
        if summary_check is not None:
            summary_check(cfg)
        cap_threads(cfg)
        yield early, store, state, cfg, changes


#: The first version whose DE-snooker move leaves the target invariant (`infer.sampling.moves.Snooker`).
FIXED_SNOOKER = (0, 3, 0)
#: The first version whose surrogate engine samples its surrogate chains with the plain run's driver
#: (`infer.sampling.surrogate_chain`); earlier engine runs take other draws and cannot be replayed.
DRIVER_SURROGATE_CHAIN = (0, 4, 0)


def check_moves_version(chain, cfg) -> None:
    """Refuse to continue a chain whose DE-snooker steps came from the biased move of infer < 0.3 (every
    surrogate-engine run, and ensemble runs with the default moves): mixing them with correct steps would
    leave a chain that is neither."""
    import h5py
    try:
        with h5py.File(str(chain), "r") as f:
            raw = f.attrs.get("infer_version", b"0")
    except OSError:
        return
    text = raw.decode() if isinstance(raw, bytes) else str(raw)
    try:
        version = tuple(int(p) for p in text.split(".")[:3])
    except ValueError:
        return
    if version < FIXED_SNOOKER and (cfg.sampling.engine == "surrogate" or cfg.sampling.moves == "de-snooker"):
        raise UserError(f"refusing to resume {chain}: it was written by infer {text}, whose DE-snooker move "
                        "narrowed posteriors by about 1–3 % in sd (fixed in 0.3.0); start a new chain "
                        "(`infer run --replace` sets this one aside)")
    if version < DRIVER_SURROGATE_CHAIN and cfg.sampling.engine == "surrogate":
        raise UserError(f"refusing to resume {chain}: it was written by infer {text}, whose surrogate chains "
                        "were drawn by another sampling loop, so this version cannot replay its exact calls; "
                        "start a new chain (`infer run --replace` sets this one aside)")


def check_dataset(state, data, cfg, chain) -> None:
    if data.sha256 != state.provenance.get("dataset_sha256"):
        raise UserError(f"refusing to resume {chain}: the dataset {cfg.dataset['file']} has changed since the "
                        "chain was started (SHA-256 differs)")


def check_blobs(stored_names, posterior, chain) -> None:
    """Refuse a resume whose posterior records other derived quantities than the chain holds (a chain
    written by a version of infer whose theory backend returned a different set)."""
    stored, now = tuple(stored_names), tuple(posterior.derived_names)
    if stored != now:
        extra = [n for n in now if n not in stored]
        gone = [n for n in stored if n not in now]
        what = "; ".join(part for part in (f"new: {', '.join(extra)}" if extra else "",
                                           f"no longer returned: {', '.join(gone)}" if gone else "") if part)
        raise UserError(f"refusing to resume {chain}: it records the derived quantities {', '.join(stored)} but "
                        f"this version of the theory code returns others ({what or 'a different order'}); finish "
                        "it with the version of infer that wrote it, or start a new chain")


# -- the ensemble engine -------------------------------------------------------------------------------------
def start(cfg, chain: Path, replace_existing: bool, clock) -> int:
    """A new run of ``cfg`` into ``chain`` (ensemble or surrogate engine); the exit code."""
    if cfg.sampling.engine == "surrogate":
        from infer import surrogate_run
        return surrogate_run.start(cfg, chain, replace_existing, clock)
    from infer.model import provenance
    from infer.model.posterior import Posterior
    from infer.parallel import Interrupted
    from infer.sampling.driver import event
    from infer.sampling.start import starting_ball
    from infer.store.chainfile import ChainStore
    from infer.store.lock import ChainLock
    posterior = Posterior(cfg)                       # validates dataset, theory and parameters first
    with EarlySignals() as early, ChainLock(str(chain)):
        store = ChainStore(str(chain))
        store.remove_strays()
        set_aside(chain, replace_existing)
        log.info("run '%s': %d sampled parameters, %d bands (%s), %d ensembles × %d walkers, up to %d steps",
                 cfg.name, len(posterior.names), posterior.like.n, "/".join(posterior.like.kinds),
                 cfg.sampling.ensembles, cfg.sampling.walkers, cfg.sampling.steps)
        evaluator = None
        try:
            evaluator = make_evaluator(cfg, posterior, early)
            start_state = starting_ball(cfg, evaluator, posterior.blob_names)
        except Interrupted:
            if evaluator is not None:
                evaluator.close()
            return paused_before_start(early, "before the first checkpoint (no chain file was written)")
        except BaseException:
            if evaluator is not None:
                evaluator.close()
            raise
        store.create(names=posterior.names, derived_names=posterior.derived_names, tex=posterior.labels(),
                     bounds=posterior.priors.bounds, start=start_state, provenance=provenance.record(cfg, posterior))
        log.info("chain file: %s", chain)
        try:
            return drive(cfg, store, evaluator, store.read(), event("start", steps=0, workers=cfg.sampling.workers),
                         clock, early)
        finally:
            evaluator.close()


def resume(chain: Path, config_path, override, extra_changes, clock, summary_check=None) -> int:
    """Continue the chain at ``chain`` (either engine); the exit code. ``summary_check(cfg)`` checks the
    summary folder before any theory call when the caller will summarise."""
    from infer.store.enginefile import engine_of
    if engine_of(chain) == "surrogate":
        from infer import surrogate_run
        return surrogate_run.resume(chain, config_path, override, extra_changes, clock, summary_check)
    from infer.model.posterior import Posterior
    from infer.parallel import Interrupted
    from infer.sampling.driver import event
    from infer.store.chainfile import ChainStore
    with resuming(chain, ChainStore, config_path, override, extra_changes, summary_check) as (
            early, store, state, cfg, changes):
        posterior = Posterior(cfg)
        check_dataset(state, posterior.data, cfg, chain)
        check_blobs(state.samples.derived_names, posterior, chain)
        if state.steps_done >= cfg.sampling.steps:
            log.info("%s already holds %d steps (requested %d); nothing to do — ask for more with --steps N",
                     chain, state.steps_done, cfg.sampling.steps)
            return EXIT_OK
        log.info("resuming %s at step %d towards %d%s", chain, state.steps_done, cfg.sampling.steps,
                 f" (changes: {'; '.join(changes)})" if changes else "")
        try:
            evaluator = make_evaluator(cfg, posterior, early)
        except Interrupted:
            return paused_before_start(early, "while the workers started")
        try:
            return drive(cfg, store, evaluator, state, event("resume", steps=state.steps_done, changes=changes),
                         clock, early)
        finally:
            evaluator.close()
