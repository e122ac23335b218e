"""The replay log of exact posterior calls: what makes the surrogate engine crash-proof and exact on resume.

Every exact (Boltzmann-code) evaluation the surrogate engine asks for goes through `ExactLog.evaluate`,
in batches. A batch is either *replayed* from the log (its points were computed in an earlier session;
they must equal the requested points bit for bit, or the resume has diverged and is refused) or
*computed* by the evaluator and appended to the log in one atomic commit before the engine sees it. The
engine is a deterministic function of its seed and of the exact results, so re-running it from the start
over a log written by a killed session repeats every cheap step (fits, surrogate training, surrogate
chains) and reads every exact result back: the final answer is identical value for value to that of an
uninterrupted run, and a kill costs at most the batch in flight (common practice for deterministic
replay; the same idea as the ensemble driver's exact resume, applied per batch of calls).

The log is a list of rows: position (P,), ln posterior, blob (B,), reason (None for a computed point) and
the stage that asked for it. Backends: `MemoryLog` here (tests, runs inside other computations) and the
chain file's engine layout (`infer.store.enginefile.EngineFile`), both with ``rows()``/``append(rows)``.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np

from infer.errors import UserError

log = logging.getLogger("infer")


class ResumeDiverged(UserError):
    """A replayed batch asked for other points than the stored ones (one line, exit 2)."""


@dataclass
class Rows:
    """A block of exact calls. Shapes: position (n, P), log_post (n,), blobs (n, B), stage (n,) int."""
    position: np.ndarray
    log_post: np.ndarray
    blobs: np.ndarray
    stage: np.ndarray
    reasons: list = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.log_post)

    @classmethod
    def empty(cls, P: int, B: int) -> "Rows":
        return cls(np.empty((0, P)), np.empty(0), np.empty((0, B)), np.empty(0, dtype=np.int64), [])

    def concat(self, other: "Rows") -> "Rows":
        return Rows(np.concatenate([self.position, other.position]),
                    np.concatenate([self.log_post, other.log_post]),
                    np.concatenate([self.blobs, other.blobs]),
                    np.concatenate([self.stage, other.stage]), list(self.reasons) + list(other.reasons))

    def slice(self, a: int, b: int) -> "Rows":
        return Rows(self.position[a:b], self.log_post[a:b], self.blobs[a:b], self.stage[a:b],
                    list(self.reasons[a:b]))


class MemoryLog:
    """An in-memory backend of the replay log."""

    def __init__(self, P: int, B: int):
        self._rows = Rows.empty(P, B)
        self.events: list = []

    def rows(self) -> Rows:
        return self._rows

    def append(self, rows: Rows, events=()) -> None:
        self._rows = self._rows.concat(rows)
        self.events.extend(events)


#: Stage codes stored with every exact call (the file keeps the names in an attribute).
STAGES = {"fit": 1, "design": 2, "correct": 3}


class ExactLog:
    """Exact evaluations through a replay log (see the module docstring).

    ``evaluator.evaluate(points) -> (log_post (n,), blobs (n, B), reasons)`` computes; ``backend`` stores.
    ``batch`` points are committed at a time (a kill loses at most one batch). ``calls`` counts every
    exact call of this run, replayed or computed.
    """

    def __init__(self, evaluator, backend, batch: int = 32, on_batch=None):
        self.evaluator = evaluator
        self.backend = backend
        self.batch = max(1, int(batch))
        self._stored = backend.rows()
        self.calls = 0
        self.replayed = 0
        self.on_batch = on_batch              # progress callback(calls)

    @property
    def computed(self) -> int:
        return self.calls - self.replayed

    def evaluate(self, points, stage: str = "correct"):
        points = np.ascontiguousarray(points, dtype=float)
        n = len(points)
        lp = np.empty(n)
        blobs = None
        reasons: list = [None] * n
        for a in range(0, n, self.batch):
            b = min(n, a + self.batch)
            chunk = points[a:b]
            i0 = self.calls
            if i0 + len(chunk) <= len(self._stored):
                got = self._stored.slice(i0, i0 + len(chunk))
                if not np.array_equal(got.position, chunk):
                    raise ResumeDiverged(f"exact calls {i0}–{i0 + len(chunk) - 1} in the chain file were made at "
                                         "other points than this session asks for: something that steers the "
                                         "engine differs from the run that wrote them (numpy/scipy/emcee "
                                         "version, BLAS thread count, or a changed setting); start a new chain")
                l, bl, rs = got.log_post, got.blobs, got.reasons
                self.replayed += len(chunk)
            else:
                if i0 < len(self._stored):       # a partly stored batch: cannot happen with aligned batches
                    raise ResumeDiverged(f"the chain file holds {len(self._stored)} exact calls, which is not a "
                                         f"batch boundary of this session (call {i0}); was [surrogate] batch "
                                         "changed? start a new chain")
                l, bl, rs = self.evaluator.evaluate(chunk)
                l, bl = np.asarray(l, float), np.asarray(bl, float)
                rows = Rows(chunk.copy(), l, bl, np.full(len(chunk), STAGES[stage], dtype=np.int64), list(rs))
                self.backend.append(rows)
                self._stored = self._stored.concat(rows)
            if blobs is None:
                blobs = np.empty((n, bl.shape[1]))
            lp[a:b], blobs[a:b], reasons[a:b] = l, bl, list(rs)
            self.calls += len(chunk)
            if self.on_batch is not None:
                self.on_batch(self.calls)
        if blobs is None:
            blobs = np.empty((0, 0))
        return lp, blobs, reasons

    def all_rows(self) -> Rows:
        """Every exact call made so far in this run (replayed or computed), in call order."""
        return self._stored.slice(0, self.calls)


def finite(rows: Rows) -> np.ndarray:
    return np.isfinite(rows.log_post) & np.array([r is None for r in rows.reasons] if rows.reasons else
                                                 np.ones(len(rows), bool))


__all__ = ["ExactLog", "MemoryLog", "Rows", "ResumeDiverged", "STAGES", "finite"]
