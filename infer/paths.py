"""Checks of the user's paths, made before the first expensive step (a theory call, a long run).

Every output location is checked writable before any work whose result it would hold (README: "check
outputs before the first expensive step"): the chain's folder, the summary folder of ``--summarize``, a
mock dataset's folder. ``--replace`` acts only on a file of our own format (read from the HDF5 ``format``
attribute), so a dataset, a chain or a user's file of another kind is never set aside or overwritten by
mistake. A file that exists but cannot be read is reported as unreadable, not as damaged. Every problem
is a one-line `UserError` naming the path.
"""
from __future__ import annotations

import os
from pathlib import Path

from infer.errors import UserError


def file_folder(path) -> None:
    """The folder of output file ``path`` exists (created if need be) and is writable."""
    d = Path(path).parent
    try:
        d.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise UserError(f"{d}: cannot create the output folder ({err.strerror})") from None
    if not os.access(d, os.W_OK | os.X_OK):
        raise UserError(f"{d}: the output folder is not writable")


def output_folder(folder, what: str) -> None:
    """An output folder written later (e.g. the summary after a run) is a writable folder or can be
    created; checked now, not created yet. ``what`` names it in the message."""
    p = Path(folder)
    if p.exists():
        if not p.is_dir():
            raise UserError(f"{p}: the {what} is not a folder")
        if not os.access(p, os.W_OK | os.X_OK):
            raise UserError(f"{p}: the {what} is not writable")
        return
    parent = p.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    if not parent.is_dir():
        raise UserError(f"{p}: cannot create the {what} ({parent} is not a folder)")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise UserError(f"{p}: cannot create the {what} ({parent} is not writable)")


def hdf5_format(path) -> str | None:
    """The ``format`` attribute of the HDF5 file at ``path``; None if it has none or is not HDF5."""
    import h5py
    try:
        with h5py.File(path, "r", locking=False) as f:
            v = f.attrs.get("format")
    except Exception:  # noqa: BLE001 - anything h5py cannot open has no format of ours
        return None
    return v.decode("utf-8", "replace") if isinstance(v, bytes) else (None if v is None else str(v))


def _is_hdf5(path) -> bool:
    import h5py
    try:
        return bool(h5py.is_hdf5(str(path)))
    except Exception:  # noqa: BLE001
        return False


def replaceable(path, fmt: str, what: str, verb: str) -> None:
    """``--replace`` (which ``verb``s an existing file) acts only on an infer ``what`` file (format
    ``fmt``)."""
    path = Path(path)
    if not path.is_file():
        raise UserError(f"{path} exists and is not a file; --replace only {verb} an infer {what} file")
    if not os.access(path, os.R_OK):
        raise UserError(f"{path}: cannot read it to check that it is an infer {what} (permission denied); "
                        "--replace leaves it alone")
    found = hdf5_format(path)
    if found != fmt:
        kind = "not an HDF5 file" if found is None and not _is_hdf5(path) else \
            f"an HDF5 file but not an infer {what} (format {found!r})"
        hint = " (a damaged chain: `infer salvage` copies its intact part)" if what == "chain" else ""
        raise UserError(f"{path} is {kind}; --replace only {verb} an infer {what} file: choose another "
                        f"path, or move the file yourself{hint}")


def readable(path, what: str) -> None:
    """A file that exists but cannot be read is reported as unreadable (not as damaged)."""
    p = Path(path)
    if p.is_file() and not os.access(p, os.R_OK):
        raise UserError(f"{path}: cannot read the {what} (permission denied)")
