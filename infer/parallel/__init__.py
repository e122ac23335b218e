"""Where a log-density runs: in this process, in isolated worker processes, or on MPI ranks.

Every evaluator takes a picklable *factory* (see `base`): the run's posterior, a surrogate, a reweighted
posterior or a Fisher stencil all run serially, in the pool and under MPI unchanged, and give the same
numbers bit for bit in each. Modules: `base` (protocol, `Interrupted`, thread caps), `inprocess`,
`pool` (isolated worker processes), `mpi` (manager–worker over MPI ranks). This package imports nothing
of the model or the theory.
"""
from __future__ import annotations

from infer.parallel.base import (DIED, Evaluator, Factory, Interrupted, LogDensity, cap_in_process_threads,
                                 never, set_threads, threads_for)
from infer.parallel.inprocess import InProcess
from infer.parallel.pool import ProcessPool

__all__ = ["DIED", "Evaluator", "Factory", "InProcess", "Interrupted", "LogDensity", "ProcessPool",
           "cap_in_process_threads", "make_evaluator", "never", "set_threads", "threads_for"]


def make_evaluator(factory, workers: int, threads: int = 0, should_stop=never, built=None,
                   points_per_call: int | None = None) -> Evaluator:
    """The evaluator for this process: rank 0's view of the MPI ranks when launched under MPI (isolated
    per rank when ``workers`` ≥ 1), else ``workers`` isolated processes, else (``workers`` = 0) this
    process — evaluating ``built`` if given (a log-density already made by ``factory``, to avoid building
    it twice), else ``factory()``. ``threads``: OpenMP threads per evaluation (0: one)."""
    from infer.parallel import mpi
    if mpi.world_size() > 1:
        ev = mpi.MPIEvaluator(factory, isolate=workers > 0, threads=threads, points_per_call=points_per_call)
    elif workers == 0:
        ev = InProcess(built if built is not None else factory())
    else:
        ev = ProcessPool(factory, workers, threads, should_stop=should_stop)
    ev.should_stop = should_stop
    return ev
