"""MPI: rank 0 drives the sampler and owns the chain file; every other rank evaluates posterior points.

Message passing with mpi4py (Dalcin et al. 2011, Adv. Water Resour. 34, 1124) in a manager–worker
pattern. Rank 0 opens an evaluation *session* by sending a picklable log-density factory (see
`infer.parallel.base`; the run's posterior is one, a surrogate or a reweighted posterior another) to every
rank; each rank calls it once and keeps what it built for later sessions with an equal factory (so only a
parameter vector and a result cross the network per point), and reports ready or a one-line error. Points are then handed out one at a time to whichever rank
is idle (dynamic load balancing, since Boltzmann-code calls vary in cost across parameter space) and
results are placed by point index, never by arrival order: the chain is the same value for value on any
number of ranks, and the same as a serial run or a local process pool of any size.

Assumptions and choices:

* waiting ranks test a posted receive with a short, growing sleep (at most 5 ms) instead of MPI's
  blocking receive, which MPI libraries implement as a busy loop that burns a core per idle rank (and
  starves the rank's own theory process when cores are shared);
* non-root ranks ignore SIGINT/SIGTERM: a scheduler signal (MPICH's ``mpiexec`` forwards it to every
  rank's process group) is handled by rank 0 alone, which abandons the unfinished step, writes its
  checkpoint and only then collects the points still in flight and releases the other ranks, so the run
  exits with 75 and resumes exactly;
* with isolation (``[sampling] workers`` ≥ 1) every rank evaluates in one isolated worker process
  (`infer.parallel.pool.ProcessPool`), so a Boltzmann-code abort costs one point, not the MPI job;
  without (``workers = 0``) it evaluates inside the rank (slightly less overhead, no isolation);
* OpenMP threads per evaluating rank: ``[sampling] threads_per_worker``, else 1 (`base.threads_for`),
  the same count a serial run or a local worker uses, never derived from the number of ranks: CAMB's
  spectra differ in the last bits between thread counts, and the chain must not depend on the rank
  count. Rank 0 warns when the evaluating ranks × threads on a node exceed the cores of their CPU set
  (oversubscription); rank 0 itself is not counted, it idles while the others evaluate.

MPI is detected from the launcher's environment (MPICH/Hydra and Slurm PMI ``PMI_RANK``/``PMI_SIZE``,
Open MPI ``OMPI_COMM_WORLD_*``, PMIx ``PMIX_RANK``); mpi4py is imported only then, so a serial run never
initialises MPI. ``mpiexec -n 1`` is an ordinary serial run. Nothing here imports the model: any
log-density runs on the ranks unchanged.
"""
from __future__ import annotations

import logging
import math
import os
import pickle
import signal
import socket
import time

import numpy as np

from infer.errors import EXIT_OK, EXIT_USAGE, UserError
from infer.parallel.base import Evaluator, Interrupted, set_threads, threads_for
from infer.parallel.inprocess import InProcess
from infer.parallel.pool import ProcessPool, pickled, setup_error

log = logging.getLogger("infer")

# Message tags. Rank 0 → evaluators: a session opens (header, then the factory and how to run it), a
# point, the session closes, the run ends. Evaluators → rank 0: ready (blob names or an error), a result.
TAG_OPEN, TAG_SETTINGS, TAG_POINT, TAG_CLOSE, TAG_EXIT = 21, 22, 23, 24, 25
TAG_READY, TAG_RESULT = 31, 32
_SIZE_VARS = ("PMI_SIZE", "OMPI_COMM_WORLD_SIZE", "PMIX_SIZE")
_RANK_VARS = ("PMI_RANK", "OMPI_COMM_WORLD_RANK", "PMIX_RANK")
_MAX_SLEEP = 0.005                      # longest sleep between tests of a pending receive (s)
_BUF = 1 << 16                          # receive buffer of the small messages (bytes, pickled)

_state: dict = {}                       # "comm", "layout" (host and CPU set per rank), "announced"


# -- detection and set-up --------------------------------------------------------------------------------
def _env_int(names):
    for var in names:
        if os.environ.get(var, "").isdigit():
            return int(os.environ[var])
    return None


def world_size() -> int:
    """Number of MPI ranks this process was launched with (1 outside an MPI launcher)."""
    size = _env_int(_SIZE_VARS)
    if size is not None:
        return size
    if _env_int(_RANK_VARS) is not None:          # a launcher that exports the rank only
        return _comm().Get_size()
    return 1


def is_root() -> bool:
    rank = _env_int(_RANK_VARS)
    return rank is None or rank == 0


def _comm():
    if "comm" not in _state:
        try:
            from mpi4py import MPI
        except ImportError:
            raise UserError("running under an MPI launcher but mpi4py is not installed: "
                            "pip install \"infer[mpi]\" (installs mpi4py and an MPI runtime)") from None
        _state["comm"] = MPI.COMM_WORLD
    return _state["comm"]


def start():
    """Every rank, at the start of ``run``/``resume``: initialise MPI and share where each rank runs."""
    comm = _comm()
    if "layout" not in _state:
        try:
            cpus = tuple(sorted(os.sched_getaffinity(0)))
        except (AttributeError, OSError):
            cpus = tuple(range(os.cpu_count() or 1))
        _state["layout"] = comm.allgather((socket.gethostname(), cpus))
    return comm


def oversubscribed(threads: int) -> list[str]:
    """Nodes where the evaluating ranks × ``threads`` exceed the cores of the CPU set they share."""
    groups: dict = {}
    for r, (host, cpus) in enumerate(_state["layout"]):
        if r != 0:
            groups.setdefault((host, cpus), []).append(r)

    def n(k, word):
        return f"{k} {word}{'s' if k > 1 else ''}"
    return [f"{n(len(ranks), 'rank')} × {n(threads, 'thread')} on {n(len(cpus), 'core')} of {host}"
            for (host, cpus), ranks in sorted(groups.items()) if len(ranks) * threads > len(cpus)]


def _probe_wait(comm, source, tag, status) -> None:
    """Wait for a message without receiving it; for the rare, possibly large ones (settings, ready)."""
    delay = 2e-5
    while not comm.Iprobe(source=source, tag=tag, status=status):
        time.sleep(delay)
        delay = min(2 * delay, _MAX_SLEEP)


class _Inbox:
    """A posted receive for the small, frequent messages (points, results), tested with a growing sleep.

    A posted receive lets the MPI library deliver straight into it; probing alone needed many progress
    calls per message with the PyPI MPICH here (12 ms against 0.6 ms per round trip). Every message on
    this path pickles to far less than ``_BUF`` bytes; the factory travels separately (`comm.recv`).
    """

    def __init__(self, comm, source, tag):
        self.comm, self.source, self.tag = comm, source, tag
        self.buf = bytearray(_BUF)
        self.req = None

    def get(self, status, stop=None):
        """``(True, message)`` (``status`` gives source and tag), or ``(False, None)`` when ``stop()``
        became true first; a receive left posted then is completed by the next call."""
        if self.req is None:
            self.req = self.comm.irecv(self.buf, source=self.source, tag=self.tag)
        delay = 2e-5
        while True:
            done, msg = self.req.test(status=status)
            if done:
                self.req = None
                return True, msg
            if stop is not None and stop():
                return False, None
            time.sleep(delay)
            delay = min(2 * delay, _MAX_SLEEP)


# -- rank 0 ----------------------------------------------------------------------------------------------
class MPIEvaluator(Evaluator):
    """Rank 0's view: sends points to ranks 1 … N−1 and places their results by point index.

    ``factory`` builds the log-density on every rank (once per rank while it stays equal); ``isolate``
    runs it in one worker process per rank; ``threads`` is ``[sampling] threads_per_worker`` (0: one);
    ``points_per_call`` (the usual number of points per `evaluate`) only serves the idle-rank advice."""

    def __init__(self, factory, isolate: bool = True, threads: int = 0, points_per_call: int | None = None):
        super().__init__()
        from mpi4py import MPI
        self.MPI = MPI
        self.comm = start()
        self.ranks = list(range(1, self.comm.Get_size()))
        if not self.ranks:
            raise UserError("MPI run with a single rank: use at least 2 (rank 0 drives, the others evaluate)")
        self.in_flight: dict[int, int] = {}            # rank → index of the point it holds
        if "inbox" not in _state:
            _state["inbox"] = _Inbox(self.comm, MPI.ANY_SOURCE, TAG_RESULT)
        self.inbox = _state["inbox"]
        threads = threads_for(1, threads)
        session = (pickled(factory), bool(isolate), threads)
        for r in self.ranks:
            self.comm.send(None, dest=r, tag=TAG_OPEN)
            self.comm.send(session, dest=r, tag=TAG_SETTINGS)
        replies = {}
        status = MPI.Status()
        for _ in self.ranks:
            _probe_wait(self.comm, MPI.ANY_SOURCE, TAG_READY, status)
            replies[status.Get_source()] = self.comm.recv(source=status.Get_source(), tag=TAG_READY)
        bad = [replies[r][1:] for r in sorted(replies) if replies[r][0] != "ready"]
        if bad:
            self.close()
            user, text = bad[0]
            if user:
                raise UserError(text)
            raise RuntimeError(text)
        names = {replies[r][1] for r in replies}
        if len(names) != 1:
            self.close()
            raise RuntimeError(f"MPI ranks built log-densities with different blob names: {sorted(names)}")
        self.blob_names = names.pop()
        self._announce(bool(isolate), threads, points_per_call)

    def _announce(self, isolate: bool, threads: int, per_call: int | None):
        if _state.get("announced"):
            return
        _state["announced"] = True
        hosts = len({host for host, _ in _state["layout"]})
        n = len(self.ranks)
        log.info("MPI: rank 0 drives, %d rank%s evaluate%s on %d node%s with %d OpenMP thread%s each, the "
                 "theory in %s", n, "s" if n > 1 else "", "" if n > 1 else "s", hosts, "s" if hosts > 1 else "",
                 threads, "" if threads == 1 else "s",
                 "an isolated process per rank" if isolate else "the ranks themselves")
        over = oversubscribed(threads)
        if over:
            log.warning("MPI: more threads than cores (%s): the ranks slow each other down; use fewer ranks per "
                        "node or a smaller [sampling] threads_per_worker", "; ".join(over))
        if not per_call:
            return
        if n > per_call:
            log.warning("MPI: %d evaluating ranks but a posterior call has only %d points: %d ranks "
                        "always idle (use more walkers, or fewer ranks)", n, per_call, n - per_call)
        elif per_call % n:
            rounds = math.ceil(per_call / n)
            log.info("MPI: the %d points of a posterior call take %d rounds on %d ranks, so %.0f %% of rank "
                     "time idles (make the points per call a multiple of %d to avoid it)", per_call, rounds, n,
                     100 * (1 - per_call / (rounds * n)), n)

    def evaluate(self, points):
        points = np.asarray(points, float)
        n = len(points)
        lp, blobs, reasons = np.full(n, -math.inf), np.full((n, self.blob_size), np.nan), [None] * n
        died, errors = {}, {}
        todo = list(range(n))[::-1]
        idle = [r for r in self.ranks if r not in self.in_flight][::-1]
        status = self.MPI.Status()
        while todo or self.in_flight:
            while todo and idle:
                r, i = idle.pop(), todo.pop()
                self.comm.send((i, points[i]), dest=r, tag=TAG_POINT)
                self.in_flight[r] = i
            got, msg = self.inbox.get(status, self.should_stop)
            if not got:
                raise Interrupted                     # close() collects what is still in flight
            r = status.Get_source()
            i, result, how, error = msg
            del self.in_flight[r]
            idle.append(r)
            if error is not None:
                errors[i] = f"MPI rank {r}: {error}"
            else:
                lp[i], blobs[i], reasons[i] = result
                if how:
                    died[i] = how
        if errors:
            raise RuntimeError(errors[min(errors)])
        self.failures.extend((points[i].tolist(), died[i]) for i in sorted(died))   # point order, not arrival
        return lp, blobs, reasons

    def close(self):
        """Collect the results still in flight (after a signal or an error), then end the session."""
        status = self.MPI.Status()
        while self.in_flight:
            self.inbox.get(status)
            self.in_flight.pop(status.Get_source(), None)
        for r in self.ranks:
            self.comm.send(None, dest=r, tag=TAG_CLOSE)
        self.ranks = []


def shutdown() -> None:
    """Rank 0, at the end of ``run``/``resume`` whatever happened: release the evaluating ranks."""
    comm = _state.get("comm")
    if comm is None:
        return
    for r in range(1, comm.Get_size()):
        comm.send(None, dest=r, tag=TAG_EXIT)


# -- ranks 1 … N−1 ---------------------------------------------------------------------------------------
def serve() -> int:
    """Non-root ranks: evaluate points for every session rank 0 opens, until released."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    try:
        comm = start()
    except UserError:
        return EXIT_USAGE                   # rank 0 reports the same problem
    from mpi4py import MPI
    status = MPI.Status()
    inbox = _Inbox(comm, 0, MPI.ANY_TAG)
    evaluator, built_for = None, None
    try:
        while True:
            _, msg = inbox.get(status)
            tag = status.Get_tag()
            if tag == TAG_POINT:
                i, x = msg
                try:
                    lp, blobs, reasons = evaluator.evaluate(x[None, :])
                    how = evaluator.failures.pop()[1] if evaluator.failures else None
                    reply = (i, (lp[0], blobs[0], reasons[0]), how, None)
                except Exception as err:  # a bug: rank 0 stops with an internal error naming this rank
                    reply = (i, None, None, f"{err.__class__.__name__}: {err}")
                comm.send(reply, dest=0, tag=TAG_RESULT)
            elif tag == TAG_OPEN:
                payload, isolate, threads = comm.recv(source=0, tag=TAG_SETTINGS)
                try:
                    evaluator, built_for = _session(payload, isolate, threads, evaluator, built_for)
                    reply = ("ready", evaluator.blob_names)
                except Exception as err:  # reported by rank 0 as one line
                    if evaluator is not None:
                        evaluator.close()
                    evaluator, built_for = None, None
                    user, text = setup_error(err)
                    reply = ("error", user, text if user else f"MPI rank {comm.Get_rank()}: {text}")
                comm.send(reply, dest=0, tag=TAG_READY)
            elif tag == TAG_EXIT:
                return EXIT_OK
            # TAG_CLOSE: nothing to do; the evaluator is kept for the next session
    finally:
        if evaluator is not None:
            evaluator.close()


def _session(payload: bytes, isolate: bool, threads: int, evaluator, built_for):
    """The evaluator of a new session: the one already built when the session asks for the same thing
    (an equal factory, run the same way — e.g. the starting ball, then the sampling), else a new one.
    ``built_for`` is ``(payload, isolate, threads, factory)`` of the current evaluator, or None."""
    how = (isolate, threads)
    if built_for is not None and built_for[1:3] == how and built_for[0] == payload:
        return evaluator, built_for
    if not isolate:
        set_threads(threads)            # before the factory's libraries are first imported in this rank
    factory = pickle.loads(payload)
    if built_for is not None and built_for[1:3] == how and _equal(built_for[3], factory):
        return evaluator, (payload, isolate, threads, factory)
    if evaluator is not None:
        evaluator.close()
    evaluator = ProcessPool(factory, 1, threads) if isolate else InProcess(factory())
    return evaluator, (payload, isolate, threads, factory)


def _equal(a, b) -> bool:
    try:
        return bool(a == b)
    except Exception:  # noqa: BLE001 - a factory whose comparison fails is simply rebuilt
        return False
