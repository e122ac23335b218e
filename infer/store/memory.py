"""A chain held in memory: the `ChainBackend` for runs inside other computations and for tests.

It stores exactly what the chain file stores (`infer.store.chainfile`), so a run gives the same
`ChainState` whichever store it writes to; nothing survives the process. The steps live in a
`infer.sampling.state.DrawBuffer` (preallocated, doubling), and every array handed in or out is a
copy, so neither the writer's reused buffers nor a reader's changes can alter what is stored.
"""
from __future__ import annotations

import copy
import json

import numpy as np

from infer.analysis.samples import Samples
from infer.sampling.state import DrawBuffer, StepState
from infer.store.base import CONVERGENCE, ChainBackend, ChainState, check_draws


def _rng_copy(states) -> list:
    return [(s[0], np.array(s[1], dtype=np.uint32), int(s[2]), int(s[3]), float(s[4])) for s in states]


def _plain(value):
    """What a record becomes after a round trip through the chain file's JSON (tuples → lists, …)."""
    return json.loads(json.dumps(value, sort_keys=True))


class MemoryStore(ChainBackend):
    """A chain in this process's memory."""

    path = None

    def __init__(self, name: str = "memory"):
        self.name = name
        self._header = None

    def create(self, *, names, derived_names, tex, bounds, start: StepState, provenance, draws=None, rng=None,
               events=None, rejections=None, failures=None, convergence=None, stop_reason=None) -> None:
        if self._header is not None:
            raise ValueError(f"chain {self.name!r} already exists")
        names, derived_names = tuple(names), tuple(derived_names)
        self._header = {"names": names, "derived_names": derived_names, "tex": _plain(tex),
                        "bounds": {n: tuple(float(v) for v in bounds[n]) for n in names},
                        "provenance": _plain({k: v.item() if isinstance(v, np.generic) else v
                                              for k, v in provenance.items()})}
        self._start = StepState(*(np.array(a, float) for a in (start.position, start.log_post, start.log_like,
                                                                 start.derived)))
        self._buffer = DrawBuffer(start.ensembles, start.walkers, len(names), len(derived_names))
        self._rng = _rng_copy(start.rng)
        self._events, self._rejections, self._failures = [], {}, []
        self._convergence = {k: [] for k in CONVERGENCE}
        self._stop_reason = ""
        self.append(draws if draws is not None else {k: a[:0] for k, a in self._buffer.view().items()},
                    start.rng if rng is None else rng, convergence=convergence, events=events,
                    rejections=rejections, failures=failures, stop_reason=stop_reason)

    def append(self, draws, rng, *, convergence=None, events=None, rejections=None, failures=None,
               stop_reason=None) -> int:
        if self._header is None:
            raise ValueError(f"chain {self.name!r} does not exist yet")
        h, b = self._header, self._buffer
        E, W = self._start.ensembles, self._start.walkers
        n = check_draws(draws, E, W, len(h["names"]), len(h["derived_names"]))
        if len(rng) != E:
            raise ValueError(f"{len(rng)} random states for {E} ensembles")
        b.extend(draws)
        self._rng = _rng_copy(rng)
        for row in convergence or ():
            for k in CONVERGENCE:
                self._convergence[k].append(float(row[k]))
        self._events += _plain(list(events or []))
        if rejections is not None:
            self._rejections = _plain(rejections)
        if failures is not None:
            self._failures = _plain(failures)
        if stop_reason is not None:
            self._stop_reason = stop_reason
        return n

    def steps_done(self) -> int:
        if self._header is None:
            raise ValueError(f"chain {self.name!r} does not exist yet")
        return self._buffer.steps

    def read(self) -> ChainState:
        if self._header is None:
            raise ValueError(f"chain {self.name!r} does not exist yet")
        h = self._header
        draws = {k: a.copy() for k, a in self._buffer.view().items()}
        samples = Samples.from_draws(h["names"], h["derived_names"], draws, tex=copy.deepcopy(h["tex"]),
                                     bounds=dict(h["bounds"]),
                                     meta={"chain": self.name, "stop_reason": self._stop_reason})
        s = self._start
        start = StepState(s.position.copy(), s.log_post.copy(), s.log_like.copy(), s.derived.copy(),
                          _rng_copy(self._rng) if self._buffer.steps == 0 else None)
        return ChainState(samples, start, _rng_copy(self._rng), copy.deepcopy(h["provenance"]),
                          copy.deepcopy(self._events), copy.deepcopy(self._rejections),
                          copy.deepcopy(self._failures),
                          {k: np.array(v, float) for k, v in self._convergence.items()})
