"""What every evaluator shares: the protocol, the stop signal and the thread cap.

An *evaluator* maps an array of points (n, P) to ``(log_density (n,), blobs (n, B), reasons)``, placing
each result by point index, never by arrival order, so a chain is the same value for value whichever
evaluator (and however many workers or ranks) computed it.

What it evaluates is given by a *factory*: a picklable callable (a module-level class or function, equal
to a copy of itself after pickling when the MPI ranks are to keep it across sessions) that returns a
*log-density* — an object with ``__call__(x) -> (ln p, blob, reason)`` (``blob`` a float array of length
``len(blob_names)``, ``reason`` None or a short countable label for a point given ln p = −∞) and
``blob_names``. The run's posterior is one (`infer.model.posterior.PosteriorFactory`); a surrogate, a
reweighted posterior or a Fisher stencil is another. Each worker process and each MPI rank calls the
factory once, so only a point vector and its result cross a process boundary per call. Nothing in
`infer.parallel` knows what the log-density is (it imports no model, no theory).

Threads: every evaluation runs with the same OpenMP/BLAS thread count (`threads_for`), set before the
factory is called in a fresh process, because CAMB's spectra differ in the last bits between thread
counts and a chain must not depend on how it was computed.
"""
from __future__ import annotations

import os
from typing import Callable, Protocol, Sequence

import numpy as np

THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
#: The reason given to a point whose evaluating process died (a Boltzmann-code abort).
DIED = "theory-process-died"


class LogDensity(Protocol):
    """What a factory returns: ``density(x) -> (ln p, blob, reason)`` with ``blob_names`` naming the blob."""

    blob_names: Sequence[str]

    def __call__(self, x: np.ndarray) -> tuple[float, np.ndarray, str | None]: ...


#: A picklable callable with no arguments that builds a `LogDensity`.
Factory = Callable[[], LogDensity]


class Interrupted(Exception):
    """Raised inside an evaluation when the caller asked to stop (signal or wall time)."""


def never() -> bool:
    return False


def set_threads(n: int) -> None:
    """Cap the OpenMP/BLAS threads of this process; effective for libraries not yet loaded."""
    for var in THREAD_VARS:
        os.environ[var] = str(n)


def threads_for(workers: int, requested: int = 0) -> int:
    """OpenMP threads per evaluation: ``[sampling] threads_per_worker``, else 1 — never derived from the
    worker count, because CAMB's spectra differ in the last bits between thread counts (measured: up to
    4e-13 relative between 1 and 2 threads, identical run to run at a fixed count), and a chain must not
    depend on how many workers or MPI ranks computed it. Parallelise with processes instead (see
    benchmarks/bench_parallel.py for the measured efficiency of both)."""
    return requested or 1


def cap_in_process_threads(workers: int, requested: int = 0) -> None:
    """Before the theory code is first loaded in this process: an in-process evaluation (``workers`` = 0)
    uses the thread count a worker process or an MPI rank would use, so a chain is identical bit for bit
    however its points were computed."""
    if workers == 0:
        set_threads(threads_for(1, requested))


class Evaluator:
    """Base: ``evaluate(points) -> (log_density, blobs, reasons)``; ``failures`` lists the points whose
    process died, as ``(point, how)``; ``should_stop`` is polled, and `Interrupted` raised when it is true.
    ``blob_names`` is known once the log-density has been built (in this process or a worker)."""

    def __init__(self, blob_names: Sequence[str] = ()):
        self.blob_names = tuple(blob_names)
        self.should_stop: Callable[[], bool] = never
        self.failures: list[tuple[list[float], str]] = []

    @property
    def blob_size(self) -> int:
        return len(self.blob_names)

    def evaluate(self, points) -> tuple[np.ndarray, np.ndarray, list]:  # pragma: no cover - interface
        raise NotImplementedError

    def close(self) -> None:
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
