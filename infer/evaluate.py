"""Where the posterior runs: in this process, in isolated worker processes, or on MPI ranks.

Every evaluator maps an array of points (n, P) to ``(log_post (n,), blobs (n, B), reasons)``; results are
placed by point index, never by arrival order, so a chain is the same value for value whichever evaluator
(and however many workers) computed it.

Why our own process pool rather than `multiprocessing.Pool` or `concurrent.futures`: a Boltzmann code can
abort the whole process in odd corners of parameter space (a Fortran STOP, a segfault) and no Python
exception catches that. The standard pools then lose every task in flight (`BrokenProcessPool`) or hang.
Here each worker owns one pipe and holds at most one point, so a dead worker costs exactly that point:
it gets ln p = −∞ with reason ``theory-process-died`` (its parameters are logged) and a fresh worker
replaces it. Workers build their own `Posterior` from the run file once, so only a point vector crosses
the pipe per call. Each worker's threads are capped (OMP_NUM_THREADS etc. set before the theory code is
imported) so that workers × threads fits the cores.
"""
from __future__ import annotations

import logging
import math
import multiprocessing as mp
import os
import signal
import time
from multiprocessing.connection import wait

import numpy as np

from .errors import UserError

log = logging.getLogger("infer")

THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
DIED = "theory-process-died"


class Interrupted(Exception):
    """Raised inside an evaluation when the driver asked to stop (signal or wall time)."""


def never() -> bool:
    return False


def set_threads(n: int) -> None:
    """Cap the OpenMP/BLAS threads of this process; effective for libraries not yet loaded."""
    for var in THREAD_VARS:
        os.environ[var] = str(n)


def threads_for(workers: int, requested: int = 0) -> int:
    if requested:
        return requested
    return max(1, (os.cpu_count() or 1) // max(1, workers))


class Evaluator:
    """Base: ``evaluate(points) -> (log_post, blobs, reasons)``; ``failures`` lists died points."""

    def __init__(self, blob_size: int):
        self.blob_size = blob_size
        self.should_stop = never
        self.failures: list[tuple[list[float], str]] = []

    def close(self) -> None:
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class InProcess(Evaluator):
    """Evaluate in this process (no isolation); for cheap models and single-process debugging."""

    def __init__(self, posterior):
        super().__init__(len(posterior.blob_names))
        self.posterior = posterior

    def evaluate(self, points):
        n = len(points)
        lp, blobs, reasons = np.empty(n), np.empty((n, self.blob_size)), [None] * n
        for i, x in enumerate(points):
            if self.should_stop():
                raise Interrupted
            lp[i], blobs[i], reasons[i] = self.posterior(x)
        return lp, blobs, reasons


def _worker_main(conn, cfg, threads):
    """Entry point of a worker process: build the posterior once, then evaluate points until EOF."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)   # the driver decides when workers stop
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    set_threads(threads)
    from .posterior import Posterior
    try:
        post = Posterior(cfg)
    except Exception as err:  # reported to the driver as one line
        conn.send(("setup-error", f"{err}"))
        return
    conn.send(("ready", None))
    while True:
        try:
            x = conn.recv()
        except (EOFError, OSError):
            return                                   # the driver has gone: leave quietly
        conn.send(post(x))


class _Worker:
    def __init__(self, ctx, cfg, threads):
        self.conn, child = ctx.Pipe()
        self.proc = ctx.Process(target=_worker_main, args=(child, cfg, threads), daemon=True)
        self.proc.start()
        child.close()
        self.task = None        # index of the point it holds
        self.ready = False

    def kill(self):
        if self.proc.is_alive():
            self.proc.kill()
        self.proc.join(timeout=5)
        self.conn.close()


class ProcessPool(Evaluator):
    """``workers`` isolated worker processes (spawned, so no state leaks from the driver)."""

    def __init__(self, cfg, workers: int, blob_size: int, threads: int = 0):
        super().__init__(blob_size)
        self.cfg = cfg
        self.threads = threads_for(workers, threads)
        self.ctx = mp.get_context("spawn")
        self.workers = [_Worker(self.ctx, cfg, self.threads) for _ in range(workers)]
        self.replaced = 0
        for w in self.workers:
            self._await_ready(w)

    def _await_ready(self, w: _Worker):
        while True:
            ready = wait([w.conn, w.proc.sentinel], timeout=0.25)
            if w.conn in ready:
                try:
                    tag, msg = w.conn.recv()
                except EOFError:
                    tag, msg = "died", None
                if tag == "ready":
                    w.ready = True
                    return
                self.close()
                if tag == "setup-error":
                    raise UserError(msg)
            if w.proc.sentinel in ready or (not ready and not w.proc.is_alive()):
                if w.conn.poll():
                    continue
                self.close()
                raise RuntimeError(f"a worker process died while starting (exit code {w.proc.exitcode})")
            if self.should_stop():
                self.close()
                raise Interrupted

    def _replace(self, i):
        self.workers[i].kill()
        self.workers[i] = _Worker(self.ctx, self.cfg, self.threads)
        self.replaced += 1
        self._await_ready(self.workers[i])

    def evaluate(self, points):
        points = np.asarray(points, float)
        n = len(points)
        lp, blobs, reasons = np.full(n, -math.inf), np.full((n, self.blob_size), np.nan), [None] * n
        todo = list(range(n))[::-1]
        busy = {}
        while todo or busy:
            for i, w in enumerate(self.workers):
                if w.task is None and todo:
                    w.task = todo.pop()
                    w.conn.send(points[w.task])
                    busy[i] = w
            if self.should_stop():
                raise Interrupted
            handles = [w.conn for w in busy.values()] + [w.proc.sentinel for w in busy.values()]
            ready = wait(handles, timeout=0.2)
            for i, w in list(busy.items()):
                got = False
                if w.conn in ready or w.conn.poll():
                    try:
                        lp[w.task], blobs[w.task], reasons[w.task] = w.conn.recv()
                        got = True
                    except (EOFError, OSError):
                        pass
                if got:
                    w.task = None
                    del busy[i]
                elif not w.proc.is_alive():
                    code = w.proc.exitcode
                    how = f"signal {-code}" if code is not None and code < 0 else f"exit code {code}"
                    reasons[w.task] = DIED
                    self.failures.append((points[w.task].tolist(), how))
                    log.warning("the theory process died (%s) at %s; that point gets ln p = -inf and the "
                                "worker is replaced", how, np.array2string(points[w.task], precision=6))
                    del busy[i]
                    self._replace(i)
        return lp, blobs, reasons

    def close(self):
        for w in self.workers:
            try:
                w.kill()
            except Exception:
                pass
        self.workers = []
