"""The MCMC driver: K independent emcee ensembles, checkpoints, stopping rules, signals, wall time.

Sampling is emcee's (Foreman-Mackey et al. 2013, PASP 125, 306), with the moves of `infer.sampling.moves`.
The driver adds what a days-long run needs:

* K ensembles with their own seeds and starting balls, stepped in lock-step (`moves.LockStep`: the
  r-th sub-step of all K ensembles is one evaluation call), so that between-chain R̂ is meaningful
  (walkers of one ensemble are not independent chains);
* exact resumability: after every completed step the driver holds a `StepState` (each ensemble's
  positions, ln p, blobs and random state); a checkpoint stores it, so a resumed run continues
  value-for-value as if it had never stopped (a step is a deterministic function of that state);
* SIGTERM/SIGINT: the handler sets a flag (and, for an in-process evaluation, interrupts the posterior
  call it lands in); evaluators poll the flag between points and every 0.2 s while waiting for workers,
  abandon the unfinished step, and the driver writes a checkpoint of the completed steps, then exits with
  `EXIT_PAUSED`. The handlers stay installed until that checkpoint is stored. The wall-time budget does
  the same: no step is started that would not finish in time, and a step still running when only the
  final checkpoint's time is left is abandoned (the budget counts from ``clock_start``; `process_age`
  gives the start of the process, which is when a batch job's clock started);
* the stopping rule (`stopping.assess`) at fixed step multiples, recorded with the chain. A resumed run
  re-assesses the chain as it was at the last check, so it stops at the same step as an uninterrupted
  run would. The chain is kept in memory in a `state.DrawBuffer` (preallocated, doubling), and a check
  looks at views of it.

Where the chain is stored is a `store.base.ChainBackend` (the crash-safe HDF5 file, or memory). The
driver never knows cosmology: it sees a vector → (ln p, blob) map through an `evaluate.Evaluator`.
"""
from __future__ import annotations

import logging
import os
import signal
import socket
import time
from dataclasses import dataclass

import numpy as np

from infer.analysis.samples import Samples
from infer.errors import EXIT_OK, EXIT_PAUSED
from infer.parallel import Interrupted
from infer.sampling import stopping
from infer.sampling.moves import LockStep, OneByOne
from infer.sampling.progress import Progress
from infer.sampling.state import BlobLayout, DrawBuffer
from infer.store.base import ChainBackend, ChainState

log = logging.getLogger("infer")


def event(kind: str, **extra) -> dict:
    return {"event": kind, "time": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "host": socket.gethostname(),
            "pid": os.getpid(), **extra}


@dataclass
class Outcome:
    code: int            # EXIT_OK or EXIT_PAUSED
    reason: str          # converged | max-steps | time-limit | signal SIGTERM | ...
    steps: int
    verdict: object = None


class Driver:
    """Runs a chain held by ``store`` (whose contents are ``state``) on ``evaluator`` towards a length."""

    def __init__(self, cfg, store: ChainBackend, evaluator, state: ChainState, interactive=None,
                 handle_signals: bool = True, check_log=None, lockstep: bool = True):
        self.cfg = cfg
        # Inside another computation that owns the signals (the surrogate engine), the caller's evaluator
        # polls the caller's flag and raises `Interrupted`; the driver then pauses as on its own signal.
        self.handle_signals = handle_signals
        self.check_log = check_log
        self.stepper = LockStep if lockstep else OneByOne      # OneByOne: a cheap in-process density
        self.store = store
        self.evaluator = evaluator
        self.state = state
        self.interactive = interactive
        self.stop_requested: str | None = None
        self.rejections = dict(state.rejections)
        self.failures = list(state.failures)
        self.deadline: float | None = None       # monotonic time by which the last checkpoint must be done
        self.reserve = 1.0                       # seconds kept for that checkpoint (grows with its cost)
        self.time_up = False
        self.layout = BlobLayout(state.samples.derived_names)
        self._step_rejections: dict = {}
        evaluator.should_stop = self._should_stop

    def _should_stop(self) -> bool:
        if self.stop_requested is not None:
            return True
        if self.deadline is not None and time.monotonic() + self.reserve > self.deadline:
            self.time_up = True
            return True
        return False

    # -- signals -------------------------------------------------------------------------------------
    def _handler(self, signum, frame):
        self.stop_requested = signal.Signals(signum).name
        if getattr(self.evaluator, "busy", False):       # inside an in-process posterior call: abandon it
            raise Interrupted

    def _install(self):
        if self.handle_signals:
            self._old = {s: signal.signal(s, self._handler) for s in (signal.SIGTERM, signal.SIGINT)}

    def _restore(self):
        for s, h in self._old.items():
            signal.signal(s, h)

    # -- one batch of points, for all ensembles (called by LockStep in this thread) ---------------------
    def _log_prob(self, coords):
        lp, blobs, reasons = self.evaluator.evaluate(coords)
        for r in reasons:
            if r is not None:       # counted when the step completes (an abandoned step is redone)
                self._step_rejections[r] = self._step_rejections.get(r, 0) + 1
        return list(zip(lp, blobs))

    # -- the chain in memory -------------------------------------------------------------------------
    def _buffers(self, target_steps: int) -> None:
        st = self.state
        E, W = st.current.ensembles, st.current.walkers
        done = st.steps_done
        cap = min(max(target_steps, done + 1), max(2 * done, done + 256))
        self.chain = DrawBuffer(E, W, len(st.samples.names), len(st.samples.derived_names), cap,
                                limit=max(target_steps, done))
        self.chain.extend(st.samples.draws)
        self.stored = done                        # steps already in the store
        self.current = st.current
        self.pending_events: list = []
        self.pending_conv: list = []
        self.accept_hist: list = []

    def samples(self, n: int | None = None) -> Samples:
        """The first ``n`` (default: all) steps in memory, as views."""
        s = self.state.samples
        return Samples.from_draws(s.names, s.derived_names, self.chain.view(0, n), tex=s.tex, bounds=s.bounds,
                                  meta=s.meta)

    # -- checkpoint ----------------------------------------------------------------------------------
    def _checkpoint(self, stop_reason=None, events=()) -> None:
        t = time.monotonic()
        failed = [{"point": p, "how": h} for p, h in self.evaluator.failures]
        self.store.append(self.chain.view(self.stored), self.current.rng, convergence=list(self.pending_conv),
                          events=self.pending_events + list(events), rejections=self.rejections,
                          failures=self.failures + failed, stop_reason=stop_reason)
        self.stored = self.chain.steps
        self.failures += failed
        self.evaluator.failures.clear()
        self.pending_events.clear()
        self.pending_conv.clear()
        self.last_ckpt_time = time.monotonic()
        self.ckpt_cost = max(self.ckpt_cost, self.last_ckpt_time - t)
        self.reserve = 1.0 + 2.0 * self.ckpt_cost

    def _checkpoint_due(self) -> bool:
        s = self.cfg.sampling
        return (self.chain.steps - self.stored >= s.checkpoint_steps or
                time.monotonic() - self.last_ckpt_time >= 60 * s.checkpoint_minutes)

    # -- convergence check ---------------------------------------------------------------------------
    def _check(self, done: int) -> None:
        self.verdict = stopping.assess(self.samples(done), self.cfg.stopping)
        self.pending_conv.append(self.verdict.row())
        eta = stopping.eta_steps(self.verdict, self.cfg.stopping) * self.step_cost
        self.progress.update(done, np.mean(self.accept_hist[-50:]), self.verdict, eta)
        log_fn = self.check_log or (log.info if not self.progress.interactive else log.debug)
        log_fn("check at step %d: %s", done, "targets met" if self.verdict.met else "; ".join(self.verdict.missing))

    # -- one step ------------------------------------------------------------------------------------
    def _step(self, stepper: LockStep) -> None:
        """One step of every ensemble (raises `Interrupted` with nothing changed if it is abandoned)."""
        ts = time.monotonic()
        self._step_rejections = {}
        n_failed = len(self.evaluator.failures)
        try:
            new = stepper.step()
        except Interrupted:
            del self.evaluator.failures[n_failed:]      # they belong to the abandoned step
            raise
        for r, k in self._step_rejections.items():
            self.rejections[r] = self.rejections.get(r, 0) + k
        first = self.chain.steps == self.state.steps_done
        self.step_cost = time.monotonic() - ts if first else 0.8 * self.step_cost + 0.2 * (time.monotonic() - ts)
        self.accept_hist.append(float(np.mean(np.any(new.position != self.current.position, axis=-1))))
        self.chain.add(new)
        self.current = new

    def _paused(self):
        if self.time_up and self.stop_requested is None:
            return "time-limit", EXIT_PAUSED
        return f"signal {self.stop_requested}", EXIT_PAUSED

    def _no_time_for_a_step(self, t0: float, time_limit: float | None) -> bool:
        if time_limit is None:
            return False
        elapsed = time.monotonic() - t0
        if elapsed + 1.5 * self.step_cost + 2.0 * self.ckpt_cost + 1.0 > time_limit:
            self.time_up = True
            return True
        return False

    # -- the run -------------------------------------------------------------------------------------
    def run(self, target_steps: int, time_limit: float | None = None, clock_start: float | None = None,
            start_event: dict | None = None) -> Outcome:
        cfg = self.cfg
        t0 = time.monotonic() if clock_start is None else clock_start
        self._buffers(target_steps)
        if start_event:
            self.pending_events.append(start_event)
        self.last_ckpt_time, self.ckpt_cost, self.step_cost = time.monotonic(), 0.0, 0.0
        if time_limit is not None:
            self.deadline = t0 + time_limit
        self.verdict = None
        done = self.chain.steps
        self.progress = Progress(done, target_steps, cfg.sampling.log_minutes, self.interactive)
        stepper = self.stepper(self.current, self.layout, cfg.sampling.moves, self._log_prob)
        self._old = {}
        reason, code = "max-steps", EXIT_OK
        try:
            self._install()
            last_check = done - done % cfg.stopping.check_every
            if last_check > 0:          # the verdict an uninterrupted run would hold at this step
                self.verdict = stopping.assess(self.samples(last_check), cfg.stopping)
            while done < target_steps:
                if self.verdict is not None and self.verdict.met and done >= cfg.stopping.min_steps:
                    reason = "converged"
                    break
                if self.stop_requested or self._no_time_for_a_step(t0, time_limit):
                    reason, code = self._paused()
                    break
                try:
                    self._step(stepper)
                except Interrupted:
                    reason, code = self._paused()
                    break
                done += 1
                if done % cfg.stopping.check_every == 0:
                    self._check(done)
                else:
                    self.progress.update(done, np.mean(self.accept_hist[-50:]))
                if self._checkpoint_due():
                    self._checkpoint()
            else:
                if self.verdict is not None and self.verdict.met:
                    reason = "converged"
            if self.stop_requested and code == EXIT_OK and reason != "converged":
                reason, code = self._paused()
            # Still under our signal handlers: a second SIGTERM/SIGINT cannot cut this checkpoint short.
            self._checkpoint(stop_reason=reason, events=[event("stop", steps=done, reason=reason)])
        finally:
            stepper.close()
            self.progress.close()
            self._restore()
        return Outcome(code, reason, done, self.verdict)


def process_age() -> float:
    """Seconds since this process started (Linux /proc; 0 where unknown). A command's wall-time budget
    should count from there (``clock_start = time.monotonic() - process_age()``): interpreter start-up
    and imports, slow on some shared file systems, are the job's time too."""
    try:
        with open("/proc/self/stat") as fh:
            start_ticks = int(fh.read().rsplit(")", 1)[1].split()[19])
        with open("/proc/uptime") as fh:
            uptime = float(fh.read().split()[0])
        age = uptime - start_ticks / os.sysconf("SC_CLK_TCK")
        return age if 0.0 <= age < 1e7 else 0.0
    except (OSError, ValueError, IndexError):
        return 0.0
