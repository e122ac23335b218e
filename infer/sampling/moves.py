"""How the ensembles move: emcee's proposals, and all ensembles' sub-steps in one evaluation call each.

Proposals run inside emcee (Foreman-Mackey et al. 2013, PASP 125, 306): by default a mixture of
differential-evolution moves (ter Braak 2006, Stat. Comput. 16, 239; weight 0.8, emcee's ``DEMove``) and
DE-snooker moves (ter Braak & Vrugt 2008, Stat. Comput. 18, 435; weight 0.2, our `Snooker`), or the
affine-invariant stretch move (Goodman & Weare 2010, CAMCoS 5, 65). These update an ensemble in
sub-ensembles, each against the rest: DE and stretch in two halves (two sequential calls of W/2 points
per step), DE-snooker in four quarters (four calls of W/4 points).

The snooker move is our own because emcee 3.1's ``DESnookerMove`` does not leave the target invariant:
it projects on δ/√|δ| instead of the unit vector δ/|δ| (so the step along the line depends on where the
walker sits on it) and applies half the Jacobian factor (|q − z|/|s − z|)^((d−1)/2) instead of
^(d−1). Measured on a 4-D Gaussian (32 walkers, 6000 steps, 4 seeds): its marginal sds came out
0.57–0.64 of the exact ones alone and 0.986–0.992 in the 0.8/0.2 mixture, against 0.995–1.003 for
`Snooker` alone and in the mixture (test: `tests/test_sampler.py`). Chains written with the old mixture
(infer < 0.3) are therefore narrowed by about 1 % in sd; the surrogate engine, whose proposal is such a
chain, inherited about 3 %.

`LockStep` advances K ensembles by one step each so that the r-th sub-step of every ensemble is one
evaluation call: a step costs max over the ensembles of their sub-steps in rounds of theory calls (2 for
DE and stretch; with the default mixture 4 when any ensemble drew a snooker move, on average
2 + 2·(1 − 0.8^K)), instead of their sum (on average 2.4·K), and K·W/2 points can be in flight at once.
Each ensemble keeps its own `emcee.EnsembleSampler`, its own move objects and its own
`numpy.random.RandomState`, and runs emcee's own ``sample`` loop, unchanged, in a thread of its
own; its ln-probability function hands the proposed points to the main thread and waits. The main thread
waits until every ensemble has either posted its points or finished its step, evaluates all posted
points in one call (in ensemble order) and hands each ensemble its slice. Because the evaluator maps
each point to its value independently of the batch it came in, and because each ensemble draws from its
own random state in the same order as when stepped alone, every chain is identical, value for value, to
stepping the ensembles one after another. The threads only run emcee's bookkeeping; the hand-over
between threads adds about 0.15 ms per ensemble and step (measured with 4 × 16 walkers on a free
log-density, beside emcee's own ≈ 0.55 ms), nothing against a theory call. The evaluation itself,
signals and the evaluator's `Interrupted` stay in the main thread.
If the evaluation fails or is interrupted, the step is abandoned: every ensemble thread is released with
an exception that ends its sampler and the thread, and `LockStep` cannot be used again (the driver stops).
"""
from __future__ import annotations

import threading
from collections.abc import Callable

import emcee
import numpy as np

from infer.sampling.state import BlobLayout, StepState


class Snooker(emcee.moves.RedBlueMove):
    """The DE-snooker move of ter Braak & Vrugt (2008, Stat. Comput. 18, 435, §3): for a walker at s and
    three other walkers z, z₁, z₂ of the complementary sub-ensembles, with e = (s − z)/|s − z|,

        q = s + γ e · (e·(z₁ − z₂)),      accepted with min(1, p(q)/p(s) · (|q − z|/|s − z|)^(d−1)),

    γ = 1.7 (their choice), four sub-ensembles (as emcee's DE-snooker)."""

    def __init__(self, gammas: float = 1.7, **kwargs):
        self.gammas = gammas
        kwargs["nsplits"] = 4
        super().__init__(**kwargs)

    def get_proposal(self, s, c, random):
        c = np.concatenate(c, axis=0)
        ns, nc, ndim = len(s), len(c), s.shape[1]
        q = np.empty((ns, ndim), dtype=np.float64)
        log_jac = np.empty(ns, dtype=np.float64)
        for i in range(ns):
            z, z1, z2 = c[random.choice(nc, size=3, replace=False)]
            delta = s[i] - z
            norm = np.linalg.norm(delta)
            e = delta / norm
            q[i] = s[i] + e * self.gammas * (np.dot(e, z1) - np.dot(e, z2))
            log_jac[i] = np.log(np.linalg.norm(q[i] - z)) - np.log(norm)
        return q, (ndim - 1.0) * log_jac


def make_moves(name: str):
    """emcee moves for ``[sampling] moves``: "stretch", "de", or the default DE/DE-snooker mixture."""
    if name == "stretch":
        return emcee.moves.StretchMove()
    if name == "de":
        return emcee.moves.DEMove()
    return [(emcee.moves.DEMove(), 0.8), (Snooker(), 0.2)]


class Abandoned(BaseException):
    """Raised inside an ensemble thread when its step is abandoned (BaseException: emcee must not catch it)."""


class LockStep:
    """K emcee ensembles stepped together from ``state``; ``evaluate(points) -> [(ln p, blob), ...]``
    computes one batch of points (n, P) for all of them. `step` returns the `StepState` after one step."""

    def __init__(self, state: StepState, layout: BlobLayout, moves: str,
                 evaluate: Callable[[np.ndarray], list]):
        self.layout = layout
        self.evaluate = evaluate
        E, W, P = state.position.shape
        self._cond = threading.Condition()
        self._posted: dict[int, np.ndarray] = {}      # ensemble -> points waiting for evaluation
        self._answers: dict[int, list] = {}           # ensemble -> results handed back
        self._finished: dict[int, object] = {}        # ensemble -> emcee.State after this step
        self._errors: dict[int, BaseException] = {}
        self._go = [False] * E
        self._closing = False
        self._abandoned = False
        self.calls = 0                                # evaluation calls made
        self._gens = []
        for e in range(E):
            s = emcee.EnsembleSampler(W, P, self._log_prob_for(e), vectorize=True, moves=make_moves(moves))
            # call ours directly: emcee's wrapper prints a traceback for every exception it passes on
            s.log_prob_fn = self._log_prob_for(e)
            self._gens.append(s.sample(state.ensemble(e), iterations=None, store=False,
                                       skip_initial_state_check=True))
        self._threads = [threading.Thread(target=self._serve, args=(e,), name=f"infer-ensemble-{e}", daemon=True)
                         for e in range(E)]
        for t in self._threads:
            t.start()

    # -- in the ensemble threads ---------------------------------------------------------------------
    def _log_prob_for(self, e: int):
        def log_prob(coords):
            with self._cond:
                if self._abandoned:
                    raise Abandoned
                self._posted[e] = np.array(coords, float)
                self._cond.notify_all()
                self._cond.wait_for(lambda: e in self._answers or self._abandoned)
                if self._abandoned:
                    raise Abandoned
                return self._answers.pop(e)
        return log_prob

    def _serve(self, e: int) -> None:
        while True:
            with self._cond:
                self._cond.wait_for(lambda: self._go[e] or self._closing or self._abandoned)
                if self._closing or self._abandoned:
                    return
                self._go[e] = False
            try:
                state = next(self._gens[e])
            except Abandoned:
                return
            except BaseException as err:               # emcee's own checks (a NaN ln p, ...)
                with self._cond:
                    self._errors[e] = err
                    self._cond.notify_all()
                return
            with self._cond:
                self._finished[e] = state
                self._cond.notify_all()

    # -- in the main thread --------------------------------------------------------------------------
    def step(self) -> StepState:
        """One step of every ensemble; each round of sub-steps is one ``evaluate`` call."""
        if self._abandoned or self._closing:
            raise RuntimeError("this LockStep was abandoned or closed")
        E = len(self._gens)
        try:
            with self._cond:
                self._finished.clear()
                self._go = [True] * E
                self._cond.notify_all()
            while True:
                with self._cond:
                    self._cond.wait_for(lambda: len(self._posted) + len(self._finished) + len(self._errors) == E)
                    if self._errors:
                        raise self._errors[min(self._errors)]
                    if len(self._finished) == E:
                        break
                    order = sorted(self._posted)
                    batch = [self._posted.pop(e) for e in order]
                results = self.evaluate(np.concatenate(batch))
                self.calls += 1
                with self._cond:
                    i = 0
                    for e, points in zip(order, batch):
                        self._answers[e] = results[i:i + len(points)]
                        i += len(points)
                    self._cond.notify_all()
        except BaseException:
            self.abandon()
            raise
        return StepState.from_ensembles([self._finished[e] for e in range(E)], self.layout)

    def abandon(self) -> None:
        """Release every ensemble thread from an unfinished step and wait for them to end."""
        with self._cond:
            self._abandoned = True
            self._cond.notify_all()
        self._join()

    def close(self) -> None:
        """End the (idle) ensemble threads."""
        with self._cond:
            self._closing = True
            self._cond.notify_all()
        self._join()

    def _join(self) -> None:
        for t in self._threads:
            if t is not threading.current_thread():
                t.join()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class OneByOne:
    """The ensembles of ``state`` stepped one after another in this thread (the interface of `LockStep`).

    For a cheap in-process log-density (the surrogate chain) there is nothing to gain from batching the
    ensembles' sub-steps, and `LockStep`'s thread hand-overs cost more than the evaluations. Each ensemble
    draws from its own random state in the same order either way, so the chains are the same (for an
    evaluator whose value at a point does not depend on the batch it came in)."""

    def __init__(self, state: StepState, layout: BlobLayout, moves: str,
                 evaluate: Callable[[np.ndarray], list]):
        self.layout = layout
        self.evaluate = evaluate
        E, W, P = state.position.shape
        self.calls = 0
        self._gens = []
        for e in range(E):
            s = emcee.EnsembleSampler(W, P, self._log_prob, vectorize=True, moves=make_moves(moves))
            s.log_prob_fn = self._log_prob
            self._gens.append(s.sample(state.ensemble(e), iterations=None, store=False,
                                       skip_initial_state_check=True))

    def _log_prob(self, coords):
        self.calls += 1
        return self.evaluate(np.array(coords, float))

    def step(self) -> StepState:
        return StepState.from_ensembles([next(g) for g in self._gens], self.layout)

    def close(self) -> None:
        self._gens = []

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
