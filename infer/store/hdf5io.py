"""Checksummed storage of text, strings and small arrays in HDF5, and HDF5's errors as one-line causes.

HDF5 checksums its metadata (superblock, object headers, chunk indexes: Jenkins' lookup3) when a file
uses the 1.10 object formats, and a chunked dataset's data when the Fletcher-32 filter is on — but not
the global heap, where variable-length strings live. So text (JSON records, a run file) is stored here as
UTF-8 bytes in a chunked, Fletcher-32-checked ``uint8`` dataset, short strings as fixed-length values, and
small arrays chunked so that the filter applies (filters act on chunked datasets only: HDF5 User's Guide,
chapter on datasets; h5py documentation, "Filter pipeline"). Reading also accepts the variable-length
strings of chain files of format 1.
"""
from __future__ import annotations

import json
import os
import re

import h5py
import numpy as np

TEXT_CHUNK = 4096


def put_text(g, name: str, text: str) -> None:
    """Store ``text`` as UTF-8 bytes in a resizable, Fletcher-32-checked dataset (rewritten only if changed)."""
    data = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    if name in g:
        ds = g[name]
        if ds.dtype == np.uint8 and ds.ndim == 1:
            if ds.shape[0] == len(data) and np.array_equal(ds[()], data):
                return
            ds.resize((len(data),))
            if len(data):
                ds[...] = data
            return
        del g[name]                                      # a format-1 variable-length string
    chunk = int(min(TEXT_CHUNK, max(256, len(data))))
    ds = g.create_dataset(name, shape=(len(data),), maxshape=(None,), dtype=np.uint8,
                          chunks=(chunk,), fletcher32=True)
    if len(data):
        ds[...] = data


def get_text(ds) -> str:
    value = ds[()]
    if isinstance(value, np.ndarray) and value.dtype == np.uint8:
        return value.tobytes().decode("utf-8")
    return value.decode("utf-8") if isinstance(value, bytes) else str(value)   # format 1


def put_json(g, name, value) -> None:
    put_text(g, name, json.dumps(value, sort_keys=True))


def get_json(ds):
    return json.loads(get_text(ds))


def fixed_strs(values) -> np.ndarray:
    """Strings as fixed-length UTF-8 values (no global heap)."""
    enc = [str(v).encode("utf-8") for v in values]
    n = max([len(e) for e in enc] + [1])
    return np.array(enc, dtype=h5py.string_dtype("utf-8", n)).reshape(len(enc))


def strs_from(ds) -> tuple[str, ...]:
    return tuple(s.decode("utf-8") if isinstance(s, bytes) else str(s) for s in ds[()])


def attr_str(obj, key, default=None):
    v = obj.attrs.get(key, default)
    return v.decode("utf-8") if isinstance(v, bytes) else v


def bytes_attr(s: str):
    return np.bytes_(s.encode("utf-8"))


def checked(g, name, data, **kw):
    """A small array dataset, chunked so that Fletcher-32 protects it."""
    data = np.asarray(data)
    shape = data.shape
    chunks = tuple(max(1, n) for n in shape) if shape else None
    if not shape:
        data = data.reshape(1)
        chunks = (1,)
    maxshape = tuple(None if n == 0 else n for n in data.shape)
    return g.create_dataset(name, data=data, chunks=chunks, maxshape=maxshape, fletcher32=True, **kw)


def provenance_from(g) -> dict:
    """The provenance record of a chain file: one JSON text per key (format 2) or attributes (format 1)."""
    if len(g):
        return {k: get_json(g[k]) for k in g}
    return {k: (v.decode() if isinstance(v, bytes) else v.item() if isinstance(v, np.generic) else v)
            for k, v in g.attrs.items()}


# -- errors ----------------------------------------------------------------------------------------------------
def errno_of(err):
    """The errno of an OSError, or one HDF5 embeds in its message ("errno = 28, ..."), else None."""
    code = getattr(err, "errno", None)
    if isinstance(code, int) and code:
        return code
    m = re.search(r"errno = (\d+)", str(err))
    return int(m.group(1)) if m else None


def io_error(err) -> OSError:
    code = errno_of(err)
    return OSError(code, os.strerror(code)) if code else OSError(short(err))


def short(err) -> str:
    """The first line of an error's message (at most 200 characters)."""
    text = str(err).strip()
    return (text.splitlines()[0] if text else err.__class__.__name__)[:200]
