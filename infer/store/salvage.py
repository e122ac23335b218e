"""Recover the intact part of a damaged chain file into a new file: ``infer salvage DAMAGED NEW``.

A chain written by `infer.store` cannot be torn by a crash of its writer, but the file can still be
damaged afterwards: truncated by a failed copy or a full quota, or hit by a bad sector or a flipped bit
(every meaningful byte carries a checksum, so such damage is *detected* — `ChainStore.read` refuses the
file — this module recovers what is still good). The original file is never opened for writing: all the
work happens on a private copy beside the new file.

Method:
1. Copy the damaged file. If it is shorter than the end-of-allocation address recorded in its HDF5
   superblock (a truncated file, which HDF5 refuses to open), pad the copy with zeros to that length; if
   the superblock says the file is still open for writing (a writer died before closing it), clear
   that flag and re-checksum the superblock (Jenkins' lookup3 hash, as HDF5 does). Zeros are never taken
   for data: any chunk that lies, even partly, beyond the original end of the file counts as lost (a
   zero-filled chunk would pass the Fletcher-32 check), and so does a step that is all zeros.
2. Read each ``/draws`` dataset chunk by chunk; a chunk that fails its Fletcher-32 check, lies beyond the
   original end of the file or cannot be read ends that dataset's intact prefix. The steps recovered are
   the longest prefix intact in all four datasets (and no longer than the file's ``steps_done``).
3. The random states in ``/resume`` belong to step ``steps_done``. If every recorded step is recovered
   and they are readable, the new file resumes exactly as the old one would have. Otherwise each
   ensemble's `numpy.random.RandomState` is re-seeded deterministically from
   ``SeedSequence([seed, ensemble, steps_recovered, 0x5A1])`` (``seed`` from the stored run file): the
   resumed chain is a valid continuation of the same Markov chain, but not bit-identical to the lost one.
4. Metadata that is unreadable is replaced by what the run file implies (an empty record list, no
   convergence checks), and a ``salvage`` event in ``/run/events`` lists what was lost. The new file is
   written in one atomic commit, then read back with `ChainStore.read` before success is reported.
"""
from __future__ import annotations

import json
import os
import shutil
import struct
import tempfile
import time

import h5py
import numpy as np

from infer.analysis.samples import DRAWS
from infer.errors import ChainFileError, UserError
from infer.sampling.state import BlobLayout, StepState
from infer.store.base import CONVERGENCE
from infer.store.chainfile import FORMAT, ChainStore, rng_from_arrays, zero_steps
from infer.store.hdf5io import attr_str, get_json, provenance_from, strs_from
from infer.store.lock import ChainLock

SIGNATURE = b"\x89HDF\r\n\x1a\n"
RESEED_KEY = 0x5A1


# -- the HDF5 superblock (HDF5 File Format Specification, "Superblock", versions 0-3) ---------------------------
def lookup3(data: bytes, initval: int = 0) -> int:
    """Bob Jenkins' lookup3 ``hashlittle`` (2006), the checksum of HDF5's version-2+ metadata."""
    M = 0xFFFFFFFF

    def rot(x, k):
        return ((x << k) | (x >> (32 - k))) & M

    length = len(data)
    a = b = c = (0xDEADBEEF + length + initval) & M
    k = 0
    while length > 12:
        a = (a + int.from_bytes(data[k:k + 4], "little")) & M
        b = (b + int.from_bytes(data[k + 4:k + 8], "little")) & M
        c = (c + int.from_bytes(data[k + 8:k + 12], "little")) & M
        a = (a - c) & M; a ^= rot(c, 4); c = (c + b) & M            # noqa: E702 (mix, as published)
        b = (b - a) & M; b ^= rot(a, 6); a = (a + c) & M            # noqa: E702
        c = (c - b) & M; c ^= rot(b, 8); b = (b + a) & M            # noqa: E702
        a = (a - c) & M; a ^= rot(c, 16); c = (c + b) & M           # noqa: E702
        b = (b - a) & M; b ^= rot(a, 19); a = (a + c) & M           # noqa: E702
        c = (c - b) & M; c ^= rot(b, 4); b = (b + a) & M            # noqa: E702
        length -= 12
        k += 12
    if length == 0:
        return c
    tail = data[k:k + length] + bytes(12 - length)
    a = (a + int.from_bytes(tail[0:4], "little")) & M
    b = (b + int.from_bytes(tail[4:8], "little")) & M
    c = (c + int.from_bytes(tail[8:12], "little")) & M
    c ^= b; c = (c - rot(b, 14)) & M                                 # noqa: E702 (final)
    a ^= c; a = (a - rot(c, 11)) & M                                 # noqa: E702
    b ^= a; b = (b - rot(a, 25)) & M                                 # noqa: E702
    c ^= b; c = (c - rot(b, 16)) & M                                 # noqa: E702
    a ^= c; a = (a - rot(c, 4)) & M                                  # noqa: E702
    b ^= a; b = (b - rot(a, 14)) & M                                 # noqa: E702
    c ^= b; c = (c - rot(b, 24)) & M                                 # noqa: E702
    return c


def _superblock(fh):
    """(offset, version, size_of_offsets, base_address, eoa_field_position) of the superblock, or None."""
    size = os.fstat(fh.fileno()).st_size
    off = 0
    while off + 64 <= size:
        fh.seek(off)
        head = fh.read(64)
        if head[:8] == SIGNATURE:
            version = head[8]
            if version in (0, 1):
                so = head[13]
                base_at = 24 if version == 0 else 28
            elif version in (2, 3):
                so = head[9]
                base_at = 12
            else:
                return None
            if so not in (2, 4, 8):
                return None
            base = int.from_bytes(head[base_at:base_at + so], "little")
            return off, version, so, base, off + base_at + 2 * so
        off = 512 if off == 0 else off * 2          # a user block is 512 bytes or a larger power of two
    return None


def _repair_copy(path) -> tuple[int, list[str]]:
    """Make the private copy openable: pad a truncated file, clear a stale "open for writing" flag.
    Returns (original size, notes)."""
    notes = []
    size = os.path.getsize(path)
    with open(path, "r+b") as fh:
        sb = _superblock(fh)
        if sb is None:
            return size, notes
        off, version, so, base, eoa_at = sb
        fh.seek(eoa_at)
        eoa = base + int.from_bytes(fh.read(so), "little")
        if size < eoa <= max(4 * size, size + (1 << 30)):
            fh.truncate(eoa)
            notes.append(f"the file is truncated ({size} of {eoa} bytes)")
        if version in (2, 3):
            fh.seek(off)
            block = bytearray(fh.read(12 + 4 * so + 4))
            stored = struct.unpack("<I", block[-4:])[0]
            if block[11] != 0 and lookup3(bytes(block[:-4])) == stored:
                block[11] = 0
                block[-4:] = struct.pack("<I", lookup3(bytes(block[:-4])))
                fh.seek(off)
                fh.write(block)
                notes.append("its writer died before closing it")
    return size, notes


# -- reading what is intact ------------------------------------------------------------------------------------
def _intact_rows(ds, file_size: int) -> int:
    """Rows (steps) of ``ds`` from the start that lie in chunks which are readable, pass Fletcher-32 and
    lie wholly inside the original file."""
    n = ds.shape[0]
    if n == 0:
        return 0
    c = ds.chunks[0] if ds.chunks else n
    good = 0
    for i0 in range(0, n, c):
        i1 = min(i0 + c, n)
        if ds.chunks:
            try:
                info = ds.id.get_chunk_info_by_coord((i0,) + (0,) * (ds.ndim - 1))
            except Exception:
                return good
            if info.byte_offset is None or info.byte_offset + info.size > file_size:
                return good
        try:
            ds[i0:i1]
        except Exception:
            return good
        good = i1
    return good


def _try(fn, lost: list, what: str, default=None):
    try:
        return fn()
    except Exception:
        lost.append(what)
        return default


def salvage(src, dst) -> tuple[int, bool]:
    """Copy the intact part of chain ``src`` into the new chain ``dst``; ``src`` is never modified.

    Returns (steps recovered, whether a resume continues exactly as the damaged run would have)."""
    src, dst = os.path.abspath(src), os.path.abspath(dst)
    if not os.path.isfile(src):
        raise UserError(f"{src}: no such chain file")
    if not dst.endswith(".h5"):
        raise UserError(f"{dst}: the new chain file's name must end in .h5")
    if os.path.exists(dst):
        raise UserError(f"{dst} already exists; salvage writes a new file and never overwrites one")
    folder = os.path.dirname(dst)
    if not os.path.isdir(folder):
        raise UserError(f"{folder}: no such folder for the new chain file")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise UserError(f"{folder}: the folder for the new chain file is not writable")
    with ChainLock(dst), tempfile.TemporaryDirectory(prefix=".infer-salvage-", dir=folder) as work:
        copy = os.path.join(work, "copy.h5")
        try:
            shutil.copyfile(src, copy)
        except OSError as err:
            raise UserError(f"{src}: cannot copy it for salvage ({err.strerror})") from None
        with open(copy, "rb") as fh:
            if _superblock(fh) is None:
                raise ChainFileError(f"{src}: cannot be salvaged: not an HDF5 file (no HDF5 signature found)")
        size, notes = _repair_copy(copy)
        try:
            f = h5py.File(copy, "r", locking=False)
        except OSError as err:
            raise ChainFileError(f"{src}: cannot be salvaged: its HDF5 structure is damaged beyond what salvage "
                                 f"repairs ({str(err).splitlines()[0][:160]})") from None
        with f:
            try:
                steps, exact, content = _recover(f, src, size, notes)
            except UserError:
                raise
            except Exception as err:          # whatever else a damaged file throws at us
                raise ChainFileError(f"{src}: cannot be salvaged ({err.__class__.__name__}: "
                                     f"{str(err).splitlines()[0][:160] if str(err) else ''})") from None
        store = ChainStore(dst)
        store.create(**content)
        state = store.read()
        if state.steps_done != steps:
            raise ChainFileError(f"{dst}: salvage wrote {state.steps_done} steps, expected {steps}")
    return steps, exact


def _recover(f, src, size, notes):
    lost: list[str] = []
    fmt = _try(lambda: attr_str(f, "format"), lost, "the format attribute")
    if fmt is not None and fmt != FORMAT:
        raise ChainFileError(f"{src}: not an infer chain file (format attribute is {fmt!r})")
    try:
        names = strs_from(f["names/sampled"])
        dnames = strs_from(f["names/derived"])
        provenance = provenance_from(f["provenance"])
        config_text = provenance["config_text"]
    except Exception as err:
        detail = str(err).splitlines()[0][:120] if str(err) else ""
        raise ChainFileError(f"{src}: cannot be salvaged: the parameter names or the stored run file are "
                             f"unreadable ({err.__class__.__name__}: {detail})") from None
    try:
        draws = {k: f[f"draws/{k}"] for k in DRAWS}
    except Exception:
        raise ChainFileError(f"{src}: cannot be salvaged: the /draws datasets themselves are unreadable") from None
    E, W = draws["log_post"].shape[1:3]
    recorded = _try(lambda: int(f.attrs["steps_done"]), lost, "the step count")
    lengths = {k: _intact_rows(ds, size) for k, ds in draws.items()}
    steps = min(lengths.values())
    if recorded is not None:
        steps = min(steps, recorded)
    arrays = {k: ds[:steps] for k, ds in draws.items()}
    zeros = zero_steps(arrays["position"], arrays["log_post"])
    if len(zeros):
        steps = int(zeros[0])
        arrays = {k: a[:steps] for k, a in arrays.items()}
    total = recorded if recorded is not None else max(ds.shape[0] for ds in draws.values())
    if steps < total:
        lost.append(f"steps {steps + 1}–{total} of {total}")

    layout = BlobLayout(dnames)
    start = _try(lambda: StepState.from_blobs(*(np.asarray(f["start"][k][()], float)
                                                for k in ("position", "log_post", "blobs")), layout),
                 lost, "the starting ball")
    if start is not None and start.position.shape != (E, W, len(names)):
        lost.append("the starting ball")
        start = None
    if start is None:
        if steps == 0:
            raise ChainFileError(f"{src}: cannot be salvaged: no step and no starting point is intact")
        start = StepState.from_draws({k: a[0] for k, a in arrays.items()})
        notes.append("the starting ball was replaced by the first step")

    rng = _try(lambda: rng_from_arrays(f["resume"]), lost, "the random states")
    exact = rng is not None and recorded is not None and steps == recorded and len(rng) == E
    if not exact:
        from infer.config import parse
        seed = _try(lambda: parse(config_text, provenance.get("config_path", "run.toml")).seed, lost,
                    "the seed", default=0)
        rng = []
        for e in range(E):
            ss = np.random.SeedSequence([int(seed), e, steps, RESEED_KEY])
            rng.append(np.random.RandomState(ss.generate_state(1)[0]).get_state())

    tex = _try(lambda: get_json(f["names/tex"]), lost, "the LaTeX labels", default={})
    bounds = _try(lambda: {n: tuple(b) for n, b in zip(names, f["names/bounds"][()].tolist())}, lost,
                  "the prior bounds")
    if bounds is None:
        from infer.config import parse, support
        cfg = parse(config_text, provenance.get("config_path", "run.toml"))
        bounds = {p.name: tuple(support(p.prior)) for p in cfg.sampled}
    events = _try(lambda: get_json(f["run/events"]), lost, "the event records", default=[])
    rejections = _try(lambda: get_json(f["run/rejections"]), lost, "the rejection counts", default={})
    failures = _try(lambda: get_json(f["run/failures"]), lost, "the theory-crash records", default=[])
    conv = _try(lambda: {k: f["convergence"][k][()] for k in CONVERGENCE}, lost, "the convergence checks")
    rows = []
    if conv is not None and len({len(v) for v in conv.values()}) == 1:
        for i in range(len(conv["step"])):
            if conv["step"][i] <= steps:
                rows.append({k: float(conv[k][i]) for k in CONVERGENCE})
    record = {"event": "salvage", "time": time.strftime("%Y-%m-%dT%H:%M:%S%z"), "source": src,
              "steps_recorded": total, "steps_recovered": steps, "exact_resume": exact,
              "lost": lost, "notes": notes}
    if not exact:
        record["reseeded"] = f"SeedSequence([seed, ensemble, {steps}, {RESEED_KEY:#x}])"
    content = dict(names=names, derived_names=dnames, tex=tex, bounds=bounds, start=start, rng=rng,
                   provenance=provenance, draws=arrays,
                   events=list(events) + [json.loads(json.dumps(record, default=str))],
                   rejections=rejections, failures=failures, convergence=rows,
                   stop_reason=f"salvaged from {os.path.basename(src)}")
    return steps, exact, content
