"""One writer per chain file: an advisory lock beside it, ``NAME.h5.lock``.

The lock is an `fcntl.flock` on the lock file, which the kernel releases when the holder dies for any
reason (including SIGKILL), so a stale lock cannot block a resume: if the flock is free, whatever the file
says belongs to a dead process and is overwritten (and reported). The file's text names the holder
(host, process id, start time) for the refusal message and for ``infer status``. After taking
the flock we check that the path still names the file we locked (a departing holder unlinks it), which
closes the classic unlink race.

File systems: flock is exclusive between processes on one host, and across hosts on NFSv4 (the Linux
client maps it to NFS byte-range locks), GPFS, and Lustre mounted with ``-o flock`` (as documented by
each). Where the file system refuses flock (Lustre's default ``noflock``, some NFSv3 set-ups) the lock
fails with a one-line error instead of silently allowing two writers. Lustre's ``localflock`` is
node-local: two runs on different nodes would both get the lock — do not use it for chains.
"""
from __future__ import annotations

import errno
import fcntl
import json
import logging
import os
import socket
import time

from infer.errors import ChainFileError

log = logging.getLogger("infer")


def holder_text(holder: dict) -> str:
    """'process 123 on host n01 since 2025-06-11 10:00:00 UTC' from a lock file's record."""
    if not holder:
        return "another process"
    return f"process {holder.get('pid')} on host {holder.get('host')} since {holder.get('started')}"


def read_holder(chain_path: str) -> dict:
    """The record in ``CHAIN.lock`` ({} if there is none). It names the holder only while
    `is_locked` is true; otherwise it is what a killed writer left."""
    try:
        fd = os.open(str(chain_path) + ".lock", os.O_RDONLY)
    except OSError:
        return {}
    try:
        return _read(fd)
    finally:
        os.close(fd)


def is_locked(chain_path: str) -> bool:
    """Whether a live process holds the chain's lock (probed with a non-blocking shared flock)."""
    try:
        fd = os.open(str(chain_path) + ".lock", os.O_RDONLY)
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
        return False
    except BlockingIOError:
        return True
    except OSError:
        return False
    finally:
        os.close(fd)


class ChainLock:
    def __init__(self, chain_path: str):
        self.path = str(chain_path) + ".lock"
        self.fd = None
        self.cleared: dict = {}          # the stale record this acquisition replaced, if any

    def acquire(self) -> "ChainLock":
        chain = self.path[:-5]
        for _ in range(20):
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as err:
                raise ChainFileError(f"{self.path}: cannot create the lock file ({err.strerror}); the chain's "
                                     "folder must be writable to run or resume it") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                holder = _read(fd)
                os.close(fd)
                raise ChainFileError(f"{chain} is being written by {holder_text(holder)}; only one run may "
                                     "write a chain (wait for it, or stop it first)") from None
            except OSError as err:
                os.close(fd)
                if err.errno in (errno.ENOLCK, errno.EOPNOTSUPP, errno.ENOSYS, errno.EINVAL):
                    raise ChainFileError(f"{self.path}: this file system does not support file locks "
                                         f"({err.strerror}); put chains on a file system with flock "
                                         "(local disk, NFSv4, GPFS, Lustre mounted with -o flock)") from None
                raise ChainFileError(f"{self.path}: cannot lock ({err.strerror})") from None
            try:
                same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
            except FileNotFoundError:
                same = False
            if not same:            # the previous holder unlinked it between our open and flock
                os.close(fd)
                continue
            old = _read(fd)
            if old:
                self.cleared = old
                log.warning("cleared a stale lock on %s left by process %s on host %s (started %s), which is "
                            "no longer running", chain, old.get("pid"), old.get("host"), old.get("started"))
            info = {"host": socket.gethostname(), "pid": os.getpid(),
                    "started": time.strftime("%Y-%m-%d %H:%M:%S %Z")}
            try:
                os.ftruncate(fd, 0)
                os.pwrite(fd, json.dumps(info).encode(), 0)
                os.fsync(fd)
            except OSError as err:
                os.close(fd)
                raise ChainFileError(f"{self.path}: cannot write the lock file ({err.strerror})") from None
            self.fd = fd
            return self
        raise ChainFileError(f"{self.path}: could not take the lock (it keeps changing)")

    def release(self) -> None:
        if self.fd is None:
            return
        try:
            os.unlink(self.path)
        except OSError:
            pass
        os.close(self.fd)
        self.fd = None

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()


def _read(fd) -> dict:
    try:
        data = os.pread(fd, 4096, 0)
        value = json.loads(data.decode()) if data else {}
        return value if isinstance(value, dict) else {}
    except (OSError, ValueError):
        return {}
