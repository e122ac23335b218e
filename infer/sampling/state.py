"""The state of a run between steps: one step of every ensemble, and a chain growing in memory.

* `BlobLayout` is the one description of the per-walker *blob* an evaluator returns beside ln p:
  ``[ln L, derived_1, …, derived_D]`` (for the band-power posterior the last derived value is χ²). The
  driver, the chain stores and salvage split and join blobs through it, never by position.
* `StepState` is what the driver knows after a completed step (or the starting ball): each ensemble's
  positions, ln posterior, ln likelihood, derived values and `numpy.random.RandomState` state. A step is a
  deterministic function of a `StepState` (emcee, Foreman-Mackey et al. 2013, PASP 125, 306, draws only
  from that random state), so storing one is what makes a resumed run continue value for value.
* `DrawBuffer` holds a chain's steps in preallocated arrays that double their capacity when full, so that
  adding a step costs amortised O(1) and a convergence check sees views of the whole chain, never a copy
  (concatenating the chain at every check costs O(T²) over a run).
"""
from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from infer.analysis.samples import DRAWS

LOG_LIKE = "log_like"


@dataclass(frozen=True)
class BlobLayout:
    """Blob of one walker: ``[log_like, *derived_names]``."""
    derived_names: tuple[str, ...]

    @classmethod
    def from_blob_names(cls, blob_names: Sequence[str]) -> "BlobLayout":
        names = tuple(blob_names)
        if not names or names[0] != LOG_LIKE:
            raise ValueError(f"a blob starts with {LOG_LIKE!r}, got {names!r}")
        return cls(names[1:])

    @property
    def names(self) -> tuple[str, ...]:
        return (LOG_LIKE,) + tuple(self.derived_names)

    @property
    def size(self) -> int:
        return 1 + len(self.derived_names)

    def split(self, blobs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(log_like (…), derived (…, D)) views of ``blobs`` shaped (…, size)."""
        blobs = np.asarray(blobs, float)
        if blobs.shape[-1] != self.size:
            raise ValueError(f"blobs of {blobs.shape[-1]} values, expected {self.size} ({', '.join(self.names)})")
        return blobs[..., 0], blobs[..., 1:]

    def join(self, log_like: np.ndarray, derived: np.ndarray) -> np.ndarray:
        """Blobs shaped (…, size) from their named parts."""
        return np.concatenate([np.asarray(log_like, float)[..., None], np.asarray(derived, float)], axis=-1)


@dataclass
class StepState:
    """Every ensemble after one step: position (E,W,P), log_post (E,W), log_like (E,W), derived (E,W,D),
    and ``rng``, each ensemble's random state (a `numpy.random.RandomState.get_state` tuple) to draw the
    next step from (None where it is not known: the starting ball of a chain that has moved on)."""
    position: np.ndarray
    log_post: np.ndarray
    log_like: np.ndarray
    derived: np.ndarray
    rng: list | None = None

    @classmethod
    def from_blobs(cls, position, log_post, blobs, layout: BlobLayout, rng=None) -> "StepState":
        """From blobs shaped (E, W, layout.size), as an evaluator returns them."""
        log_like, derived = layout.split(blobs)
        return cls(np.asarray(position, float), np.asarray(log_post, float), log_like, derived,
                   None if rng is None else list(rng))

    @classmethod
    def from_draws(cls, draws: Mapping[str, np.ndarray], rng=None) -> "StepState":
        """One step from the `DRAWS` arrays of one step (shaped (E, W[, ·]))."""
        return cls(*(np.asarray(draws[k], float) for k in DRAWS), rng=None if rng is None else list(rng))

    @classmethod
    def from_ensembles(cls, states, layout: BlobLayout) -> "StepState":
        """From each ensemble's `emcee.State` (emcee squeezes a blob of one value to a scalar per walker)."""
        walkers = len(states[0].log_prob)
        blobs = np.stack([np.asarray(s.blobs, float).reshape(walkers, layout.size) for s in states])
        log_like, derived = layout.split(blobs)
        return cls(np.stack([s.coords for s in states]), np.stack([s.log_prob for s in states]), log_like,
                   derived, [s.random_state for s in states])

    @property
    def ensembles(self) -> int:
        return self.position.shape[0]

    @property
    def walkers(self) -> int:
        return self.position.shape[1]

    @property
    def blobs(self) -> np.ndarray:
        return np.concatenate([self.log_like[..., None], self.derived], axis=-1)

    @property
    def draws(self) -> dict[str, np.ndarray]:
        return {k: getattr(self, k) for k in DRAWS}

    def ensemble(self, e: int):
        """Ensemble ``e`` as an `emcee.State` (copies; with its random state)."""
        import emcee
        if self.rng is None:
            raise ValueError("this step state has no random states to continue from")
        blobs = self.blobs[e]
        if blobs.shape[-1] == 1:          # emcee squeezes a one-value blob to a scalar per walker: match it
            blobs = blobs[:, 0].copy()
        return emcee.State(self.position[e].copy(), log_prob=self.log_post[e].copy(), blobs=blobs,
                           random_state=self.rng[e])


class DrawBuffer:
    """The steps of a chain in memory: preallocated `DRAWS` arrays whose capacity doubles when full (up to
    ``limit`` steps, when the run's length is known), filled ``steps`` deep."""

    def __init__(self, ensembles: int, walkers: int, n_sampled: int, n_derived: int, capacity: int = 64,
                 limit: int | None = None):
        self.tails = {"position": (ensembles, walkers, n_sampled), "log_post": (ensembles, walkers),
                      "log_like": (ensembles, walkers), "derived": (ensembles, walkers, n_derived)}
        self.limit = limit
        self.steps = 0
        self._arrays = {k: np.empty((max(1, capacity),) + t) for k, t in self.tails.items()}

    @property
    def capacity(self) -> int:
        return len(self._arrays["log_post"])

    def _reserve(self, n: int) -> None:
        need = self.steps + n
        if need <= self.capacity:
            return
        cap = max(need, 2 * self.capacity)
        if self.limit is not None:
            cap = max(need, min(cap, self.limit))
        for k, a in self._arrays.items():
            grown = np.empty((cap,) + a.shape[1:])
            grown[:self.steps] = a[:self.steps]
            self._arrays[k] = grown

    def extend(self, draws: Mapping[str, np.ndarray]) -> None:
        """Add ``n`` steps given as `DRAWS` arrays shaped (n, E, W[, ·])."""
        n = len(draws["position"])
        self._reserve(n)
        for k in DRAWS:
            self._arrays[k][self.steps:self.steps + n] = draws[k]
        self.steps += n

    def add(self, step: StepState) -> None:
        """Add one step."""
        self._reserve(1)
        for k in DRAWS:
            self._arrays[k][self.steps] = getattr(step, k)
        self.steps += 1

    def view(self, start: int = 0, stop: int | None = None) -> dict[str, np.ndarray]:
        """Views of steps ``start:stop`` (valid until the next `extend`/`add` that grows the arrays)."""
        stop = self.steps if stop is None else min(stop, self.steps)
        return {k: a[start:stop] for k, a in self._arrays.items()}
