"""Sampling a surrogate posterior: the ensemble driver of a plain run, on a cheap vectorised log-density.

The surrogate engine (`infer.sampling.engine`) needs many nearly independent draws of exp s(x). They come
from the driver of a plain run (`infer.sampling.driver.Driver`) — independent emcee ensembles with the
default differential-evolution/snooker moves (ter Braak 2006; ter Braak & Vrugt 2008), judged by the same
stopping rule (`infer.sampling.stopping`: automatic burn-in, rank-normalised split-R̂ between ensembles,
bulk/tail ESS, run length over τ; Vehtari et al. 2021) — with two differences: the chain lives in a
`infer.store.memory.MemoryStore`, and the ensembles are stepped one after another (`moves.OneByOne`,
each sub-step one vectorised surrogate call), since thread hand-overs would cost more than the calls. The walkers start in a ball of half the Laplace σ around
the best fit (`infer.sampling.start.gaussian_ball`). The kept draws (after the burn-in the rule chose) are
thinned by ⌈τ⌉ per walker, so that they can serve as (nearly) independent proposal draws.

The chain's rule is fixed here, not taken from the run file's ``[stopping]``: a resumed engine run with
another weight-ESS target must repeat the same chains value for value.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass, replace

import numpy as np

from infer.config import Sampling, Stopping
from infer.parallel import Interrupted
from infer.sampling.state import LOG_LIKE

log = logging.getLogger("infer")

#: The surrogate chain's stopping rule (its ``ess_above`` is raised to the draws the engine needs).
RULE = Stopping(rhat_below=1.01, ess_above=0.0, tau_multiple=50.0, check_every=100, min_steps=200)


class VectorEvaluator:
    """An evaluator (the `infer.parallel` protocol) of a vectorised log-density; the blob is ln p itself
    (the driver's blob layout starts with ln L, and a surrogate posterior has no separate likelihood).
    ``outer_stop()`` is polled before each call: when it is true the call raises `Interrupted`."""

    blob_names = (LOG_LIKE,)

    def __init__(self, logpost, outer_stop=None):
        self.logpost = logpost
        self.outer_stop = outer_stop or (lambda: False)
        self.blob_size = 1
        self.failures: list = []
        self.should_stop = lambda: False            # the driver's own flag (set by the driver)
        self.calls = 0

    def evaluate(self, points):
        if self.outer_stop():
            raise Interrupted
        points = np.asarray(points, float)
        lp = np.asarray(self.logpost(points), float)
        self.calls += len(points)
        lp = np.where(np.isfinite(lp), lp, -np.inf)
        return lp, lp[:, None].copy(), [None if np.isfinite(v) else "surrogate-minus-inf" for v in lp]

    def close(self):
        pass


@dataclass(frozen=True)
class _Settings:
    """What `Driver` reads of a run file: its ``sampling`` and ``stopping`` tables."""
    sampling: Sampling
    stopping: Stopping


def walkers_for(P: int) -> int:
    """Walkers per ensemble: 4P, at least 16, even (the DE moves need a few times P partners)."""
    w = max(4 * P, 16)
    return w + w % 2


def sample_surrogate(logpost, laplace, seed: int, draws_needed: int, *, lower, upper, walkers: int = 0,
                     ensembles: int = 2, rule: Stopping | None = None, max_steps: int = 20000,
                     check_every: int | None = None, should_stop=None, log_minutes: float = 1.0):
    """Run ``ensembles`` × ``walkers`` walkers on ``logpost`` with the plain run's driver until its stopping
    rule is met with a bulk/tail ESS ≥ ``draws_needed`` and the thinned pool holds ``draws_needed`` draws.
    Returns (pool (n, P), verdict dict). Raises `Interrupted` when ``should_stop()`` turned true."""
    from infer.errors import EXIT_PAUSED
    from infer.sampling.driver import Driver
    from infer.sampling.start import gaussian_ball
    from infer.store.memory import MemoryStore
    P = len(laplace.mean)
    W = walkers or walkers_for(P)
    rule = replace(rule or RULE, ess_above=float(draws_needed), time_limit=None,
                   **({"check_every": int(check_every)} if check_every else {}))
    settings = _Settings(Sampling(walkers=W, ensembles=ensembles, steps=max_steps, moves="de-snooker",
                                  checkpoint_steps=10 ** 9, checkpoint_minutes=1e9, log_minutes=log_minutes), rule)
    ev = VectorEvaluator(logpost, should_stop)
    start = gaussian_ball(laplace.mean, laplace.chol, 0.5, lower, upper, seed, ensembles, W, ev, ev.blob_names)
    names = [f"x{i}" for i in range(P)]
    store = MemoryStore("surrogate-chain")
    store.create(names=names, derived_names=(), tex={n: n for n in names},
                 bounds={n: (float(a), float(b)) for n, a, b in zip(names, lower, upper)}, start=start, provenance={})
    pool, verdict = np.empty((0, P)), {"met": False}
    while True:
        driver = Driver(settings, store, ev, store.read(), interactive=False, handle_signals=False,
                        check_log=log.debug, lockstep=False)
        outcome = driver.run(max_steps)
        if outcome.code == EXIT_PAUSED:
            raise Interrupted
        v = outcome.verdict
        if v is None:
            return pool, verdict
        pos = driver.samples().position                                 # (T, E, W, P), views
        thin = max(1, int(math.ceil(v.tau_max))) if math.isfinite(v.tau_max) else max(1, len(pos))
        pool = pos[v.burn::thin].reshape(-1, P).copy()
        met = bool(v.met and len(pool) >= draws_needed)
        verdict = {"met": met, "steps": int(v.step), "burn": int(v.burn), "rhat_max": float(v.rhat_max),
                   "ess_min": float(min(v.ess_bulk_min, v.ess_tail_min)), "tau_max": float(v.tau_max),
                   "surrogate_calls": ev.calls, "pool": len(pool)}
        if met or not v.met or outcome.steps >= max_steps:
            return pool, verdict
        # The rule is met but thinning by ⌈τ⌉ left fewer draws than needed: ask for proportionally more ESS.
        settings = replace(settings, stopping=replace(settings.stopping, ess_above=settings.stopping.ess_above
                                                      * 1.1 * draws_needed / max(len(pool), 1)))
