"""Where a chain lives: the interface every chain store implements, and what reading one gives.

Two implementations: `infer.store.chainfile.ChainStore`, the crash-safe HDF5 file a days-long run writes,
and `infer.store.memory.MemoryStore`, for a chain run inside another computation (a calibration over many
mock data sets, a surrogate chain, a test) that needs no file. The driver takes either (the pattern of
emcee's backends, Foreman-Mackey et al. 2013, PASP 125, 306: one interface, a memory and a file backend).

A store holds, beside the steps (`infer.analysis.samples.DRAWS`): the names, LaTeX labels and prior
bounds of the quantities, the starting ball, each ensemble's random state after the last stored step
(so a resumed run continues exactly), the provenance record, and the run records (events, counts of
rejected points by reason, points whose theory process died, the convergence checks, the stop reason).
"""
from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from infer.analysis.samples import DRAWS, Samples
from infer.sampling.state import StepState

CONVERGENCE = ("step", "rhat_max", "ess_bulk_min", "ess_tail_min", "tau_max", "met")


@dataclass
class ChainState:
    """Everything a store holds, read into memory."""
    samples: Samples                    # every stored step
    start: StepState                    # the starting ball (step 0); its ``rng`` is None once steps exist
    rng: list                           # per ensemble: the random state after the last stored step
    provenance: dict
    events: list = field(default_factory=list)
    rejections: dict = field(default_factory=dict)
    failures: list = field(default_factory=list)
    convergence: dict = field(default_factory=dict)     # CONVERGENCE name -> (checks,) array

    @property
    def steps_done(self) -> int:
        return self.samples.steps

    @property
    def current(self) -> StepState:
        """The state to continue from: the newest stored step (or the starting ball) with ``rng``."""
        if self.steps_done == 0:
            s = self.start
            return StepState(s.position, s.log_post, s.log_like, s.derived, list(self.rng))
        return StepState.from_draws({k: a[-1] for k, a in self.samples.draws.items()}, self.rng)


def check_draws(draws: Mapping[str, np.ndarray], ensembles: int, walkers: int, n_sampled: int,
                n_derived: int) -> int:
    """The number of steps in ``draws`` (`DRAWS` arrays shaped (n, E, W[, ·])); ValueError if inconsistent."""
    n = len(draws["position"])
    tails = {"position": (ensembles, walkers, n_sampled), "log_post": (ensembles, walkers),
             "log_like": (ensembles, walkers), "derived": (ensembles, walkers, n_derived)}
    for k in DRAWS:
        if np.shape(draws[k]) != (n,) + tails[k]:
            raise ValueError(f"draws[{k!r}] has shape {np.shape(draws[k])}, expected {(n,) + tails[k]}")
    return n


class ChainBackend(ABC):
    """A chain's storage. A writer adds whole steps with the state after them; a reader gets a `ChainState`."""

    path: str | None = None             # where it lives, for messages (None: in memory)

    @abstractmethod
    def create(self, *, names, derived_names, tex, bounds, start: StepState, provenance, draws=None, rng=None,
               events=None, rejections=None, failures=None, convergence=None, stop_reason=None) -> None:
        """Start a new chain from the starting ball ``start`` (with each ensemble's random state).

        Optionally with steps already taken (``draws``, `DRAWS` arrays shaped (n, E, W, …)) and ``rng``,
        the random states after them (used by salvage); records as in `append`."""

    @abstractmethod
    def append(self, draws: Mapping[str, np.ndarray], rng, *, convergence=None, events=None, rejections=None,
               failures=None, stop_reason=None) -> int:
        """Add ``n`` steps (`DRAWS` arrays shaped (n, E, W, …)) and ``rng``, each ensemble's random state
        after them. ``convergence`` rows and ``events`` are added to those stored; ``rejections``,
        ``failures`` and ``stop_reason`` replace them when given. Returns ``n``. The arrays are not kept:
        the caller may reuse them."""

    @abstractmethod
    def read(self) -> ChainState:
        """Everything stored."""

    @abstractmethod
    def steps_done(self) -> int:
        """Steps stored (cheaper than `read`)."""
