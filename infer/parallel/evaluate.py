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

Stopping: every evaluator polls ``should_stop`` (set by the driver on SIGTERM/SIGINT or when the wall-time
budget runs out) and raises `Interrupted`, abandoning the unfinished step: the pool polls every 0.2 s
while it waits and kills the workers still busy, so a 20-minute theory call never delays a pause;
`InProcess` marks the span of each posterior call as interruptible (``busy``) so that the driver's signal
handler may raise `Interrupted` inside it (a Python-level wait such as a sleep ends at once; a C or
Fortran call ends first — use workers ≥ 1 for slow Boltzmann codes).
"""
from __future__ import annotations

import logging
import math
import multiprocessing as mp
import os
import signal
from multiprocessing.connection import wait

import numpy as np

from infer.errors import UserError

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
    """OpenMP threads per evaluation: ``[sampling] threads_per_worker``, else 1 — never derived from the
    worker count, because CAMB's spectra differ in the last bits between thread counts (measured: up to
    4e-13 relative between 1 and 2 threads, identical run to run at a fixed count), and a chain must not
    depend on how many workers or MPI ranks computed it. Parallelise with processes instead (see
    tests/bench_parallel.py for the measured efficiency of both)."""
    return requested or 1


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
        self.busy = False           # True only while a posterior call runs: the signal handler may interrupt it

    def evaluate(self, points):
        n = len(points)
        lp, blobs, reasons = np.empty(n), np.empty((n, self.blob_size)), [None] * n
        for i, x in enumerate(points):
            if self.should_stop():
                raise Interrupted
            self.busy = True
            try:
                lp[i], blobs[i], reasons[i] = self.posterior(x)
            finally:
                self.busy = False
        return lp, blobs, reasons


def _worker_main(conn, cfg, threads):
    """Entry point of a worker process: build the posterior once, then evaluate points until EOF."""
    # The driver decides when workers stop (it kills them): a scheduler's SIGTERM or a Ctrl-C sent to the
    # whole process group must not look like a theory-code crash and cost a point.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    set_threads(threads)
    from infer.model.posterior import Posterior
    try:
        post = Posterior(cfg)
    except Exception as err:  # reported to the driver as one line
        _send(conn, ("setup-error", f"{err}"))
        return
    if not _send(conn, ("ready", None)):
        return
    while True:
        try:
            x = conn.recv()
        except (EOFError, OSError):
            return                                   # the driver has gone: leave quietly
        if not _send(conn, post(x)):
            return


def _send(conn, message) -> bool:
    try:
        conn.send(message)
        return True
    except OSError:                                  # broken pipe: the driver has gone
        return False


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
        self.task = None
        self.ready = False


class ProcessPool(Evaluator):
    """``workers`` isolated worker processes (spawned, so no state leaks from the driver)."""

    def __init__(self, cfg, workers: int, blob_size: int, threads: int = 0, should_stop=never):
        super().__init__(blob_size)
        self.should_stop = should_stop          # polled while workers start (a signal during start-up)
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
                raise UserError(f"a worker process died while starting (exit code {w.proc.exitcode}): the theory "
                                "code could not be set up in a fresh process; run once with --workers 0 to see "
                                "its error")
            if self.should_stop():
                self.close()
                raise Interrupted

    def _replace(self, i):
        self.workers[i].kill()
        self.workers[i] = _Worker(self.ctx, self.cfg, self.threads)
        self.replaced += 1
        self._await_ready(self.workers[i])

    def _died(self, w, points, reasons):
        code = w.proc.exitcode
        how = f"signal {-code}" if code is not None and code < 0 else f"exit code {code}"
        reasons[w.task] = DIED
        self.failures.append((points[w.task].tolist(), how))
        log.warning("the theory process died (%s) at %s; that point gets ln p = -inf and the "
                    "worker is replaced", how, np.array2string(points[w.task], precision=6))

    def _abandon(self, busy):
        """Stop mid-step: kill the workers holding points (their results would be stale); they are
        replaced when the pool is next used."""
        for w in busy.values():
            w.kill()

    def evaluate(self, points):
        points = np.asarray(points, float)
        n = len(points)
        lp, blobs, reasons = np.full(n, -math.inf), np.full((n, self.blob_size), np.nan), [None] * n
        todo = list(range(n))[::-1]
        busy = {}
        while todo or busy:
            for i, w in enumerate(self.workers):
                if w.task is None and todo:
                    if not w.ready or not w.proc.is_alive():      # killed while idle, or abandoned earlier
                        if self.should_stop():
                            self._abandon(busy)
                            raise Interrupted
                        self._replace(i)
                        w = self.workers[i]
                    w.task = todo.pop()
                    try:
                        w.conn.send(points[w.task])
                    except OSError:                               # died between calls: retry elsewhere
                        todo.append(w.task)
                        w.task = None
                        self._replace(i)
                        continue
                    busy[i] = w
            if self.should_stop():
                self._abandon(busy)
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
                    if self.should_stop():         # e.g. a signal to the whole process group: not a crash
                        self._abandon(busy)
                        raise Interrupted
                    self._died(w, points, reasons)
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
