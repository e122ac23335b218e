"""A pool of isolated worker processes, each holding at most one point; a crash costs that point only.

Why our own pool rather than `multiprocessing.Pool` or `concurrent.futures`: a Boltzmann code can abort
the whole process in odd corners of parameter space (a Fortran STOP, a segfault) and no Python exception
catches that. The standard pools then lose every task in flight (`BrokenProcessPool`) or hang. Here each
worker owns one pipe and holds at most one point, so a dead worker costs exactly that point: it gets
ln p = −∞ with reason ``theory-process-died`` (its parameters are logged and kept in ``failures``) and a
fresh worker replaces it. Results are placed by point index.

Each worker is spawned (no state leaks from the driver), caps its OpenMP/BLAS threads, then unpickles the
factory and calls it once (see `infer.parallel.base`); the factory travels as bytes, so that no library
it imports is loaded before the thread cap. Workers ignore SIGINT/SIGTERM: the driver decides when they
stop. Stopping: the pool polls ``should_stop`` every 0.2 s while it waits and kills the workers still
busy (`Interrupted`), so a 20-minute theory call never delays a pause.
"""
from __future__ import annotations

import logging
import math
import multiprocessing as mp
import pickle
import signal
from multiprocessing.connection import wait

import numpy as np

from infer.errors import UserError
from infer.parallel.base import DIED, Evaluator, Interrupted, never, set_threads, threads_for

log = logging.getLogger("infer")


def pickled(factory) -> bytes:
    """The factory as bytes; a factory that cannot be pickled is a programming error, named here."""
    if not callable(factory):
        raise TypeError(f"an evaluator needs a log-density factory (a picklable callable such as "
                        f"infer.model.posterior.PosteriorFactory(cfg)), got {type(factory).__name__}")
    try:
        return pickle.dumps(factory)
    except Exception as err:  # noqa: BLE001 - pickle raises many kinds
        raise TypeError(f"the log-density factory {factory!r} cannot be sent to another process "
                        f"({err.__class__.__name__}: {err}); define it at module level") from None


def build(payload: bytes, threads: int):
    """In a fresh process: cap the threads, then unpickle the factory and call it once."""
    set_threads(threads)
    return pickle.loads(payload)()


def setup_error(err: BaseException) -> tuple[bool, str]:
    """``(is_user_error, one line)`` of an exception raised while building a log-density."""
    if isinstance(err, UserError):
        return True, str(err)
    return False, f"{err.__class__.__name__}: {err}"


def _worker_main(conn, payload, threads):
    """Entry point of a worker process: build the log-density once, then evaluate points until EOF."""
    # A scheduler's SIGTERM or a Ctrl-C sent to the whole process group must not look like a theory-code
    # crash and cost a point.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    try:
        density = build(payload, threads)
        names = tuple(density.blob_names)
    except Exception as err:  # reported to the driver as one line
        _send(conn, ("setup-error", setup_error(err)))
        return
    if not _send(conn, ("ready", names)):
        return
    while True:
        try:
            x = conn.recv()
        except (EOFError, OSError):
            return                                   # the driver has gone: leave quietly
        if not _send(conn, density(x)):
            return


def _send(conn, message) -> bool:
    try:
        conn.send(message)
        return True
    except OSError:                                  # broken pipe: the driver has gone
        return False


class _Worker:
    def __init__(self, ctx, payload, threads):
        self.conn, child = ctx.Pipe()
        self.proc = ctx.Process(target=_worker_main, args=(child, payload, threads), daemon=True)
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
    """``workers`` isolated worker processes evaluating the log-density ``factory()`` builds in each."""

    def __init__(self, factory, workers: int, threads: int = 0, should_stop=never):
        super().__init__()
        if workers < 1:
            raise ValueError(f"a process pool needs at least one worker, got {workers}")
        self.should_stop = should_stop          # polled while workers start (a signal during start-up)
        self.payload = pickled(factory)
        self.threads = threads_for(workers, threads)
        self.ctx = mp.get_context("spawn")
        self.workers = [_Worker(self.ctx, self.payload, self.threads) for _ in range(workers)]
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
                    if not self.blob_names:
                        self.blob_names = msg
                    return
                self.close()
                if tag == "setup-error":
                    user, text = msg
                    if user:
                        raise UserError(text)
                    raise RuntimeError(f"a worker process could not build the log-density: {text}")
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
        self.workers[i] = _Worker(self.ctx, self.payload, self.threads)
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
