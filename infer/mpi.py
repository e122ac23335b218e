"""MPI: rank 0 drives the sampler and owns the chain file; every other rank evaluates posterior points.

Points are handed out one at a time to whichever rank is idle (dynamic load balancing, since theory
calls vary in cost) and results are stored by point index, so the chain does not depend on the number
of ranks or on which rank computed what. Non-root ranks ignore SIGINT/SIGTERM: the scheduler's signal is
handled by rank 0, which checkpoints and then releases the others. Each rank still runs its theory code
in an isolated worker process when ``[sampling] workers`` ≥ 1, so a Boltzmann-code abort costs one point,
not the MPI job.

MPI is detected from the launcher's environment (MPICH/Hydra ``PMI_SIZE``, Open MPI
``OMPI_COMM_WORLD_SIZE``, PMIx ``PMIX_SIZE``); mpi4py is imported only then (Dalcin et al. 2011,
Adv. Water Resour. 34, 1124).
"""
from __future__ import annotations

import math
import os
import signal
import time

import numpy as np

from .errors import UserError
from .evaluate import Evaluator, InProcess, Interrupted, ProcessPool

TAG_POINT, TAG_RESULT, TAG_DONE = 11, 12, 13
_SIZE_VARS = ("PMI_SIZE", "OMPI_COMM_WORLD_SIZE", "PMIX_SIZE", "MPI_LOCALNRANKS")
_RANK_VARS = ("PMI_RANK", "OMPI_COMM_WORLD_RANK", "PMIX_RANK")


def world_size() -> int:
    for var in _SIZE_VARS:
        if os.environ.get(var, "").isdigit():
            return int(os.environ[var])
    return 1


def is_root() -> bool:
    for var in _RANK_VARS:
        if os.environ.get(var, "").isdigit():
            return int(os.environ[var]) == 0
    return True


def _comm():
    try:
        from mpi4py import MPI
    except ImportError:
        raise UserError("running under an MPI launcher but mpi4py is not installed: "
                        "pip install \"infer[mpi]\" (installs mpi4py and an MPI runtime)") from None
    return MPI.COMM_WORLD


class MPIEvaluator(Evaluator):
    """Rank 0's view: sends points to ranks 1 … N−1 and gathers results in point order."""

    def __init__(self, cfg, blob_size: int):
        super().__init__(blob_size)
        self.comm = _comm()
        self.ranks = list(range(1, self.comm.Get_size()))
        if not self.ranks:
            raise UserError("MPI run with a single rank: use at least 2 (rank 0 drives, the others evaluate)")
        self.comm.bcast(cfg, root=0)
        errors = self.comm.gather(None, root=0)
        bad = [e for e in errors[1:] if e]
        if bad:
            self.close()
            raise UserError(bad[0])

    def evaluate(self, points):
        from mpi4py import MPI
        points = np.asarray(points, float)
        n = len(points)
        lp, blobs, reasons = np.full(n, -math.inf), np.full((n, self.blob_size), np.nan), [None] * n
        todo = list(range(n))[::-1]
        idle = list(self.ranks)
        out = 0
        status = MPI.Status()
        while todo or out:
            while todo and idle:
                i = todo.pop()
                self.comm.send((i, points[i]), dest=idle.pop(), tag=TAG_POINT)
                out += 1
            while not self.comm.Iprobe(source=MPI.ANY_SOURCE, tag=TAG_RESULT, status=status):
                if self.should_stop():
                    self._drain(out)
                    raise Interrupted
                time.sleep(0.002)
            i, r, died = self.comm.recv(source=status.Get_source(), tag=TAG_RESULT)
            lp[i], blobs[i], reasons[i] = r
            if died:
                self.failures.append((points[i].tolist(), died))
            idle.append(status.Get_source())
            out -= 1
        return lp, blobs, reasons

    def _drain(self, out):
        """Collect results still in flight so no rank is left blocked in a send."""
        for _ in range(out):
            self.comm.recv(source=self._any(), tag=TAG_RESULT)

    def _any(self):
        from mpi4py import MPI
        return MPI.ANY_SOURCE

    def close(self):
        for r in self.ranks:
            self.comm.send(None, dest=r, tag=TAG_DONE)
        self.ranks = []


def shutdown() -> None:
    """Rank 0, at exit: release the evaluating ranks."""
    if world_size() > 1 and is_root():
        _comm().bcast(None, root=0)


def serve(args) -> int:
    """Non-root ranks: evaluate points for each evaluator rank 0 opens, until released."""
    from mpi4py import MPI
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    comm = _comm()
    while True:
        cfg = comm.bcast(None, root=0)
        if cfg is None:
            return 0
        from .posterior import Posterior
        evaluator, error = None, None
        try:
            post = Posterior(cfg)
            evaluator = (InProcess(post) if cfg.sampling.workers == 0 else
                         ProcessPool(cfg, 1, len(post.blob_names), cfg.sampling.threads_per_worker or 1))
        except Exception as err:  # reported by rank 0 as one line
            error = str(err)
        comm.gather(error, root=0)
        status = MPI.Status()
        while True:
            msg = comm.recv(source=0, tag=MPI.ANY_TAG, status=status)
            if status.Get_tag() == TAG_DONE:
                break
            i, x = msg
            lp, blobs, reasons = evaluator.evaluate(x[None, :])
            died = evaluator.failures.pop()[1] if evaluator.failures else None
            comm.send((i, (lp[0], blobs[0], reasons[0]), died), dest=0, tag=TAG_RESULT)
        if evaluator is not None:
            evaluator.close()
