"""The MCMC driver: K independent emcee ensembles, checkpoints, stopping rules, signals, wall time.

Sampling is emcee's (Foreman-Mackey et al. 2013, PASP 125, 306): by default a mixture of differential-
evolution moves (ter Braak 2006, Stat. Comput. 16, 239; weight 0.8) and DE-snooker moves (ter Braak &
Vrugt 2008, Stat. Comput. 18, 435; weight 0.2), or the affine-invariant stretch move (Goodman & Weare 2010,
CAMCoS 5, 65). The driver adds what a days-long run needs:

* K ensembles with their own seeds and starting balls, stepped in lock-step, so that between-chain R̂ is
  meaningful (walkers of one ensemble are not independent chains);
* exact resumability: after every completed step the driver knows each ensemble's positions, ln p,
  blobs and random state; a checkpoint stores those, so a resumed run continues value-for-value as if it
  had never stopped (the only randomness is each ensemble's `numpy.random.RandomState`, which emcee draws
  from; a step is a deterministic function of state + random state);
* SIGTERM/SIGINT: the handler sets a flag (and, for an in-process evaluation, interrupts the posterior
  call it lands in); evaluators poll the flag between points and every 0.2 s while waiting for workers,
  abandon the unfinished step, and the driver writes a checkpoint of the completed steps, then exits with
  `EXIT_PAUSED`. The handlers stay installed until that checkpoint is on disk. The wall-time budget does
  the same: no step is started that would not finish in time, and a step still running when only the
  final checkpoint's time is left is abandoned (the budget counts from ``clock_start``; `process_age`
  gives the start of the process, which is when a batch job's clock started);
* the stopping rule (`convergence.assess`) at fixed step multiples, recorded in the chain file. A resumed
  run re-assesses the chain as it was at the last check, so it stops at the same step as an uninterrupted
  run would.

The driver never knows cosmology: it sees a vector → (ln p, blob) map through an `evaluate.Evaluator`.
"""
from __future__ import annotations

import logging
import os
import signal
import socket
import time
from dataclasses import dataclass

import emcee
import numpy as np

from infer.sampling import stopping as convergence
from infer.errors import EXIT_OK, EXIT_PAUSED, UserError
from infer.parallel.evaluate import Interrupted
from infer.sampling.progress import Progress
from infer.store.chainfile import ChainState, ChainStore

log = logging.getLogger("infer")


def make_moves(name: str):
    if name == "stretch":
        return emcee.moves.StretchMove()
    if name == "de":
        return emcee.moves.DEMove()
    return [(emcee.moves.DEMove(), 0.8), (emcee.moves.DESnookerMove(), 0.2)]


def event(kind: str, **extra) -> dict:
    return {"event": kind, "time": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "host": socket.gethostname(),
            "pid": os.getpid(), **extra}


@dataclass
class Outcome:
    code: int            # EXIT_OK or EXIT_PAUSED
    reason: str          # converged | max-steps | time-limit | signal SIGTERM | ...
    steps: int
    verdict: object = None


def starting_ball(cfg, evaluator, blob_size: int):
    """Each ensemble's starting positions: guess + spread·N(0,1) per parameter, inside the prior support,
    redrawn until every walker has finite ln p; and each ensemble's emcee random state. All from
    ``numpy.random.SeedSequence([seed, ensemble])`` so a run is reproducible from its seed."""
    E, W = cfg.sampling.ensembles, cfg.sampling.walkers
    guess = np.array([p.guess for p in cfg.sampled])
    spread = np.array([p.spread for p in cfg.sampled])
    from infer.config import support
    lo, hi = (np.array(b) for b in zip(*(support(p.prior) for p in cfg.sampled)))
    pos = np.empty((E, W, len(guess)))
    lp = np.empty((E, W))
    blobs = np.empty((E, W, blob_size))
    rng_states = []
    for e in range(E):
        ss = np.random.SeedSequence([cfg.seed, e])
        gen = np.random.default_rng(ss.spawn(1)[0])
        rng_states.append(np.random.RandomState(ss.generate_state(1)[0]).get_state())
        todo = np.arange(W)
        for attempt in range(200):
            x = guess + spread * gen.standard_normal((len(todo), len(guess)))
            x = np.where((x > lo) & (x < hi), x, np.clip(guess, lo, hi))   # never outside the support
            l, b, _ = evaluator.evaluate(x)
            pos[e, todo], lp[e, todo], blobs[e, todo] = x, l, b
            todo = todo[~np.isfinite(l)]
            if not len(todo):
                break
        else:
            raise UserError(f"{cfg.path}: could not find a starting point with finite posterior after 200 "
                            "tries: check 'guess' and 'spread' under [parameters] against the priors")
    return {"position": pos, "log_post": lp, "blobs": blobs}, rng_states


class Driver:
    def __init__(self, cfg, store: ChainStore, evaluator, state: ChainState, interactive=None):
        self.cfg = cfg
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
        self._old = {s: signal.signal(s, self._handler) for s in (signal.SIGTERM, signal.SIGINT)}

    def _restore(self):
        for s, h in self._old.items():
            signal.signal(s, h)

    # -- the ensemble log-probability seen by emcee ----------------------------------------------------
    def _log_prob(self, coords):
        lp, blobs, reasons = self.evaluator.evaluate(coords)
        for r in reasons:
            if r is not None:       # counted when the step completes (an abandoned step is redone)
                self._step_rejections[r] = self._step_rejections.get(r, 0) + 1
        return list(zip(lp, blobs))

    def run(self, target_steps: int, time_limit: float | None = None, clock_start: float | None = None,
            start_event: dict | None = None) -> Outcome:
        cfg, st = self.cfg, self.state
        E, W = cfg.sampling.ensembles, cfg.sampling.walkers
        P = len(st.samples.names)
        B = 1 + len(st.samples.derived_names)
        t0 = time.monotonic() if clock_start is None else clock_start
        done = st.steps_done
        pos, lp, blobs = st.last()
        rng = list(st.rng)
        samplers = [emcee.EnsembleSampler(W, P, self._log_prob, vectorize=True,
                                          moves=make_moves(cfg.sampling.moves)) for _ in range(E)]
        for s in samplers:      # call ours directly: emcee's wrapper prints a traceback for every exception,
            s.log_prob_fn = self._log_prob      # including the Interrupted that pauses a run on a signal
        gens = [s.sample(emcee.State(pos[e].copy(), log_prob=lp[e].copy(), blobs=blobs[e].copy(),
                                     random_state=rng[e]),
                         iterations=max(target_steps - done, 0), store=False, skip_initial_state_check=True)
                for e, s in enumerate(samplers)]
        chain = {"position": [st.samples.position], "log_post": [st.samples.log_post],
                 "log_like": [st.samples.log_like], "derived": [st.samples.derived]}
        buf = {k: [] for k in chain}
        pending_events = [start_event] if start_event else []
        pending_conv = []
        last_ckpt_time, ckpt_cost, step_cost = time.monotonic(), 0.0, 0.0
        if time_limit is not None:
            self.deadline = t0 + time_limit
        prev = pos.copy()
        accept_hist = []
        verdict = None
        progress = Progress(done, target_steps, cfg.sampling.log_minutes, self.interactive)

        def flush(stop_reason=None, events=()):
            nonlocal last_ckpt_time, ckpt_cost
            t = time.monotonic()
            stack = {k: (np.stack(v) if v else np.empty((0,) + chain[k][0].shape[1:])) for k, v in buf.items()}
            self.store.append(position=stack["position"], log_post=stack["log_post"], log_like=stack["log_like"],
                              derived=stack["derived"], rng=rng, convergence=list(pending_conv),
                              events=pending_events + list(events), rejections=self.rejections,
                              failures=self.failures + [{"point": p, "how": h} for p, h in self.evaluator.failures],
                              stop_reason=stop_reason)
            for k in buf:
                if buf[k]:
                    chain[k].append(stack[k])
                buf[k].clear()
            self.failures += [{"point": p, "how": h} for p, h in self.evaluator.failures]
            self.evaluator.failures.clear()
            pending_events.clear()
            pending_conv.clear()
            last_ckpt_time = time.monotonic()
            ckpt_cost = max(ckpt_cost, last_ckpt_time - t)
            self.reserve = 1.0 + 2.0 * ckpt_cost

        def current_samples():
            s = st.samples
            full = {k: np.concatenate(chain[k] + ([np.stack(buf[k])] if buf[k] else [])) for k in chain}
            return type(s)(s.names, s.derived_names, full["position"], full["derived"], full["log_post"],
                           full["log_like"], s.tex, s.bounds, s.meta)

        def paused():
            if self.time_up and self.stop_requested is None:
                return "time-limit", EXIT_PAUSED
            return f"signal {self.stop_requested}", EXIT_PAUSED

        self._install()
        reason, code = "max-steps", EXIT_OK
        try:
            last_check = done - done % cfg.stopping.check_every
            if last_check > 0:          # the verdict an uninterrupted run would hold at this step
                verdict = convergence.assess(_prefix(st.samples, last_check), cfg.stopping)
            while done < target_steps:
                if verdict is not None and verdict.met and done >= cfg.stopping.min_steps:
                    reason = "converged"
                    break
                if self.stop_requested:
                    reason, code = paused()
                    break
                if time_limit is not None:
                    elapsed = time.monotonic() - t0
                    if elapsed + 1.5 * step_cost + 2.0 * ckpt_cost + 1.0 > time_limit:
                        self.time_up = True
                        reason, code = paused()
                        break
                ts = time.monotonic()
                self._step_rejections = {}
                n_failed = len(self.evaluator.failures)
                try:
                    new = [next(g) for g in gens]
                except Interrupted:
                    del self.evaluator.failures[n_failed:]      # they belong to the abandoned step
                    reason, code = paused()
                    break
                for r, k in self._step_rejections.items():
                    self.rejections[r] = self.rejections.get(r, 0) + k
                step_cost = 0.8 * step_cost + 0.2 * (time.monotonic() - ts) if done > st.steps_done else \
                    time.monotonic() - ts
                done += 1
                coords = np.stack([s.coords for s in new])
                b = np.stack([np.asarray(s.blobs, float).reshape(W, B) for s in new])
                buf["position"].append(coords)
                buf["log_post"].append(np.stack([s.log_prob for s in new]))
                buf["log_like"].append(b[..., 0])
                buf["derived"].append(b[..., 1:])
                rng = [s.random_state for s in new]
                accept_hist.append(float(np.mean(np.any(coords != prev, axis=-1))))
                prev = coords
                if done % cfg.stopping.check_every == 0:
                    verdict = convergence.assess(current_samples(), cfg.stopping)
                    pending_conv.append(verdict.row())
                    eta = convergence.eta_steps(verdict, cfg.stopping) * step_cost
                    progress.update(done, np.mean(accept_hist[-50:]), verdict, eta)
                    log_fn = log.info if not progress.interactive else log.debug
                    log_fn("check at step %d: %s", done, "targets met" if verdict.met else
                           "; ".join(verdict.missing))
                else:
                    progress.update(done, np.mean(accept_hist[-50:]))
                if (len(buf["position"]) >= cfg.sampling.checkpoint_steps or
                        time.monotonic() - last_ckpt_time >= 60 * cfg.sampling.checkpoint_minutes):
                    flush()
            else:
                if verdict is not None and verdict.met:
                    reason = "converged"
            if self.stop_requested and code == EXIT_OK and reason != "converged":
                reason, code = paused()
            # Still under our signal handlers: a second SIGTERM/SIGINT cannot cut this checkpoint short.
            flush(stop_reason=reason, events=[event("stop", steps=done, reason=reason)])
        finally:
            progress.close()
            self._restore()
        self.state.steps_done = done
        return Outcome(code, reason, done, verdict)


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


def _prefix(samples, n: int):
    """The first ``n`` steps of ``samples``."""
    return type(samples)(samples.names, samples.derived_names, samples.position[:n], samples.derived[:n],
                         samples.log_post[:n], samples.log_like[:n], samples.tex, samples.bounds,
                         dict(samples.meta))
