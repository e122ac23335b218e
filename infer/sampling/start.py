"""The starting ball: where each ensemble's walkers begin, and each ensemble's random state.

Walkers start in a small Gaussian ball around the run file's guesses (common practice for ensemble
samplers; Foreman-Mackey et al. 2013, PASP 125, 306, §4): ``guess + spread · N(0, 1)`` per parameter,
kept inside the prior support and redrawn until every walker has a finite ln p. Everything is derived from
``numpy.random.SeedSequence([seed, ensemble])`` (NumPy's entropy-mixing seed sequence), so a run is
reproducible from its seed and the ensembles draw independent streams.
"""
from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from infer.errors import UserError
from infer.sampling.state import BlobLayout, StepState

MAX_TRIES = 200


def starting_ball(cfg, evaluator, blob_names: Sequence[str]) -> StepState:
    """Each ensemble's starting positions, their ln p and blobs (``blob_names``, e.g. a posterior's
    ``blob_names``), and each ensemble's emcee random state, as a `StepState`."""
    from infer.config import support
    guess = np.array([p.guess for p in cfg.sampled])
    spread = np.array([p.spread for p in cfg.sampled])
    lo, hi = (np.array(b) for b in zip(*(support(p.prior) for p in cfg.sampled)))

    def draw(gen, n, attempt):
        x = guess + spread * gen.standard_normal((n, len(guess)))
        return np.where((x > lo) & (x < hi), x, np.clip(guess, lo, hi))   # never outside the support
    return _ball(draw, cfg.seed, cfg.sampling.ensembles, cfg.sampling.walkers, len(guess), evaluator, blob_names,
                 f"{cfg.path}: could not find a starting point with finite posterior after {MAX_TRIES} tries: "
                 "check 'guess' and 'spread' under [parameters] against the priors")


def gaussian_ball(centre, chol, scale: float, lower, upper, seed: int, ensembles: int, walkers: int, evaluator,
                  blob_names: Sequence[str]) -> StepState:
    """The same for a correlated ball ``centre + scale · L z`` (``chol`` L, e.g. of a Laplace covariance),
    kept strictly inside [lower, upper]; walkers whose ln p is not finite are redrawn from a ball five
    times smaller."""
    centre, chol = np.asarray(centre, float), np.asarray(chol, float)
    lower, upper = np.asarray(lower, float), np.asarray(upper, float)
    width = np.where(np.isfinite(upper - lower), upper - lower, 0.0)

    def draw(gen, n, attempt):
        x = centre + gen.standard_normal((n, len(centre))) @ chol.T * (scale if attempt == 0 else 0.2 * scale)
        return np.clip(x, lower + 1e-9 * width, upper - 1e-9 * width)
    return _ball(draw, seed, ensembles, walkers, len(centre), evaluator, blob_names,
                 f"no finite log-density within {MAX_TRIES} tries around the centre")


def _ball(draw, seed: int, E: int, W: int, P: int, evaluator, blob_names, failure: str) -> StepState:
    """Walkers from ``draw(generator, n, attempt)``, redrawn until finite; seeds from SeedSequence([seed, e])."""
    layout = BlobLayout.from_blob_names(blob_names)
    pos = np.empty((E, W, P))
    lp = np.empty((E, W))
    blobs = np.empty((E, W, layout.size))
    rng_states = []
    for e in range(E):
        ss = np.random.SeedSequence([seed, e])
        gen = np.random.default_rng(ss.spawn(1)[0])
        rng_states.append(np.random.RandomState(ss.generate_state(1)[0]).get_state())
        todo = np.arange(W)
        for attempt in range(MAX_TRIES):
            x = draw(gen, len(todo), attempt)
            l, b, _ = evaluator.evaluate(x)
            pos[e, todo], lp[e, todo], blobs[e, todo] = x, l, b
            todo = todo[~np.isfinite(l)]
            if not len(todo):
                break
        else:
            raise UserError(failure)
    return StepState.from_blobs(pos, lp, blobs, layout, rng_states)
