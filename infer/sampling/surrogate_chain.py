"""Sampling a surrogate posterior: the ensemble driver on a cheap, vectorised log-density, in memory.

The surrogate engine (`infer.sampling.engine`) needs many nearly independent draws of exp s(x). They come
from the same machinery as a plain run — independent emcee ensembles with the default differential-
evolution/snooker moves (ter Braak 2006; ter Braak & Vrugt 2008), started from the Laplace approximation,
judged by the same stopping rule (`infer.sampling.stopping`: rank-normalised split-R̂ between ensembles,
bulk/tail ESS, run length over τ; Vehtari et al. 2021) — but with an in-memory store and an evaluator
that calls the vectorised surrogate on a whole half-ensemble at once. The kept draws are thinned by
⌈τ⌉ per walker, so that they can serve as (nearly) independent proposal draws.
"""
from __future__ import annotations

import math

import numpy as np

from infer.analysis import diagnostics


class VectorEvaluator:
    """An evaluator (the `infer.parallel` protocol) of a vectorised log-density; blobs are empty."""

    def __init__(self, logpost):
        self.logpost = logpost
        self.blob_size = 0
        self.failures: list = []
        self.should_stop = lambda: False
        self.calls = 0

    def evaluate(self, points):
        points = np.asarray(points, float)
        lp = np.asarray(self.logpost(points), float)
        self.calls += len(points)
        lp = np.where(np.isfinite(lp), lp, -np.inf)
        return lp, np.empty((len(points), 0)), [None if np.isfinite(v) else "surrogate-minus-inf" for v in lp]

    def close(self):
        pass


def sample_surrogate(logpost, laplace, seed: int, draws_needed: int, *, lower, upper, walkers: int = 0,
                     ensembles: int = 2, rule=None, max_steps: int = 20000, check_every: int = 100):
    """Run ``ensembles`` × ``walkers`` emcee walkers on ``logpost`` until the stopping rule is met and the
    thinned pool holds ``draws_needed`` draws. Returns (pool (n, P), verdict dict)."""
    import emcee
    from infer.sampling.moves import make_moves
    from infer.config import Stopping
    rule = rule or Stopping()
    P = len(laplace.mean)
    W = walkers or max(4 * P, 16) + (max(4 * P, 16) % 2)
    chol = laplace.chol
    ev = VectorEvaluator(logpost)
    samplers, states = [], []
    for e in range(ensembles):
        ss = np.random.SeedSequence([seed, e])
        gen = np.random.default_rng(ss.spawn(1)[0])
        x = laplace.mean + gen.standard_normal((W, P)) @ chol.T * 0.5
        x = np.clip(x, lower + 1e-9 * (upper - lower), upper - 1e-9 * (upper - lower)) \
            if np.all(np.isfinite(upper - lower)) else x
        lp = ev.evaluate(x)[0]
        bad = ~np.isfinite(lp)
        for _ in range(100):
            if not bad.any():
                break
            x[bad] = laplace.mean + gen.standard_normal((bad.sum(), P)) @ chol.T * 0.1
            lp[bad] = ev.evaluate(x[bad])[0]
            bad = ~np.isfinite(lp)
        s = emcee.EnsembleSampler(W, P, lambda q: ev.evaluate(q)[0], vectorize=True, moves=make_moves("de-snooker"))
        s._random = np.random.RandomState(ss.generate_state(1)[0])
        samplers.append(s)
        states.append(emcee.State(x, log_prob=lp, random_state=s.random_state))
    verdict = {"met": False}
    pool = np.empty((0, P))
    store = []
    steps = 0
    while steps < max_steps:
        for _ in range(check_every):
            row = []
            for e, s in enumerate(samplers):
                states[e] = next(s.sample(states[e], iterations=1, store=False, skip_initial_state_check=True))
                row.append(states[e].coords.copy())
            store.append(np.stack(row))
        steps += check_every
        arr = np.asarray(store)                                    # (T, E, W, P)
        T = len(arr)
        half = T // 2
        kept = arr[half:]
        per = diagnostics.all_diagnostics(kept, [f"x{i}" for i in range(P)])
        rhat = max(d["rhat"] for d in per.values())
        ess = min(min(d["ess_bulk"], d["ess_tail"]) for d in per.values())
        tau = max(d["tau"] for d in per.values())
        thin = max(1, int(math.ceil(tau))) if math.isfinite(tau) else len(kept)
        pool = kept[::thin].reshape(-1, P)
        met = (rhat < rule.rhat_below and ess >= draws_needed and
               T > rule.tau_multiple * tau and len(pool) >= draws_needed)
        verdict = {"met": bool(met), "steps": T, "rhat_max": float(rhat), "ess_min": float(ess),
                   "tau_max": float(tau), "surrogate_calls": ev.calls, "pool": len(pool)}
        if met:
            return pool, verdict
    return pool, verdict
