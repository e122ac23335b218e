"""Atomic file replacement: the one helper every writer of a user-visible file uses.

A new file is filled under a hidden temporary name in the target's own folder, flushed and ``fsync``ed,
then moved onto the target name in one step (POSIX ``rename``; ``link`` when the target must not be
clobbered), and the folder is ``fsync``ed so the new name survives a host crash. A kill at any instant
leaves either the old file or the new one under the name, never a torn one, plus at worst a hidden
``.NAME.*.tmp`` that nobody reads (common practice for crash-safe writes; see e.g. the POSIX
``rename(2)`` guarantee). The temporary file is created exclusively with mode 0666 & ~umask, so the
result has the permissions of any file the user creates (not the 0600 of `tempfile.mkstemp`).

The chain store (`infer.store.chainfile`) has its own copy-on-write commit, because it must also read
the copy back and verify it before publishing; it uses `fsync_path` from here.
"""
from __future__ import annotations

import os
import secrets
from pathlib import Path
from typing import Callable

from infer.errors import UserError


def fsync_path(path, directory: bool = False) -> None:
    """``fsync`` a file, or a folder's entry list (``directory``); folders that refuse are skipped."""
    try:
        fd = os.open(path, os.O_RDONLY | (os.O_DIRECTORY if directory else 0))
    except OSError:
        if directory:
            return
        raise
    try:
        os.fsync(fd)
    except OSError:
        if not directory:
            raise
    finally:
        os.close(fd)


def temporary_name(target: Path) -> Path:
    """A fresh hidden name beside ``target``, created empty and exclusively (never an existing file)."""
    while True:
        tmp = target.parent / f".{target.name}.{secrets.token_hex(6)}.tmp"
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            continue
        os.close(fd)
        return tmp


def write_atomic(path, fill: Callable[[str], None], *, overwrite: bool = True) -> Path:
    """Create or replace ``path`` atomically: ``fill(tmp)`` writes the content into the temporary path.

    ``overwrite=False`` refuses (one-line `UserError`) when ``path`` exists, also when another process
    creates it meanwhile (hard link, which never clobbers). Any failure removes the temporary file and
    leaves ``path`` as it was. Returns the resolved path.
    """
    target = Path(path).expanduser()
    parent = target.parent.resolve()
    target = parent / target.name
    if not overwrite and os.path.lexists(target):
        raise UserError(f"{target}: refusing to overwrite an existing file")
    tmp = temporary_name(target)
    try:
        fill(str(tmp))
        fsync_path(tmp)
        if overwrite:
            os.replace(tmp, target)
        else:
            try:
                os.link(tmp, target)
            except FileExistsError:
                raise UserError(f"{target}: refusing to overwrite an existing file") from None
            except OSError:                       # a file system without hard links
                if os.path.lexists(target):
                    raise UserError(f"{target}: refusing to overwrite an existing file") from None
                os.replace(tmp, target)
            else:
                os.unlink(tmp)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    fsync_path(parent, directory=True)
    return target


def write_text_atomic(path, text: str, *, overwrite: bool = True) -> Path:
    """`write_atomic` for UTF-8 text."""
    def fill(tmp):
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(text)
    return write_atomic(path, fill, overwrite=overwrite)
