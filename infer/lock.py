"""One writer per chain file: an advisory lock beside it, ``NAME.h5.lock``.

The lock is an `fcntl.flock` on the lock file, which the kernel releases when the holder dies for any
reason (including SIGKILL), so a stale lock cannot block a resume: if the flock is free, whatever the file
says belongs to a dead process and is overwritten (and reported). The file's text names the holder
(host, process id, start time) for the refusal message. After taking the flock we check that the path
still names the file we locked (a departing holder unlinks it), which closes the classic unlink race.
On network file systems flock is honoured by NFSv4 and Lustre with the flock mount option; see the
contributor guide.
"""
from __future__ import annotations

import fcntl
import json
import logging
import os
import socket
import time

from .errors import ChainFileError

log = logging.getLogger("infer")


class ChainLock:
    def __init__(self, chain_path: str):
        self.path = str(chain_path) + ".lock"
        self.fd = None

    def acquire(self) -> "ChainLock":
        for _ in range(20):
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as err:
                raise ChainFileError(f"{self.path}: cannot create the lock file ({err.strerror})") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                holder = _read(fd)
                os.close(fd)
                who = (f"process {holder.get('pid')} on host {holder.get('host')} since {holder.get('started')}"
                       if holder else "another process")
                raise ChainFileError(f"{self.path[:-5]} is being written by {who}; only one run may write a "
                                     "chain (wait for it, or stop it first)") from None
            try:
                same = os.fstat(fd).st_ino == os.stat(self.path).st_ino
            except FileNotFoundError:
                same = False
            if not same:            # the previous holder unlinked it between our open and flock
                os.close(fd)
                continue
            old = _read(fd)
            if old:
                log.warning("cleared a stale lock on %s left by process %s on host %s (started %s), which is "
                            "no longer running", self.path[:-5], old.get("pid"), old.get("host"), old.get("started"))
            info = {"host": socket.gethostname(), "pid": os.getpid(),
                    "started": time.strftime("%Y-%m-%d %H:%M:%S %Z")}
            os.ftruncate(fd, 0)
            os.pwrite(fd, json.dumps(info).encode(), 0)
            os.fsync(fd)
            self.fd = fd
            return self
        raise ChainFileError(f"{self.path}: could not take the lock (it keeps changing)")

    def release(self) -> None:
        if self.fd is None:
            return
        try:
            os.unlink(self.path)
        except FileNotFoundError:
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
        return json.loads(data.decode()) if data else {}
    except (OSError, ValueError):
        return {}
