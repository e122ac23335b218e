"""The chain file: one HDF5 file per run that a hard kill at any instant cannot corrupt.

Design (the contributor guide lists the alternatives we rejected): a published chain file is never
modified in place. A checkpoint copies the current file to a temporary file in the same folder, appends
the new steps there, flushes and fsyncs it and atomically renames it over the old name (POSIX ``rename``),
then fsyncs the folder. So at every instant the name points at a complete file holding every step up to
the last completed checkpoint, and nothing else: ``kill -9`` mid-step, mid-copy or mid-flush leaves the old
file (plus a stray ``.NAME.h5.tmp-PID`` that the next writer removes). Readers in other processes open
the file read-only and, because a rename never touches the inode they opened, always see one consistent
checkpoint — what HDF5's single-writer/multiple-reader mode promises, without its restrictions (SWMR
cannot add datasets or attributes after the writer starts, and a killed SWMR writer leaves the superblock
marked open).

Every byte that carries meaning is checksummed, so damage is reported, never read as data: the file uses
the HDF5 1.10 object formats (``libver='v110'``: superblock, object headers with their attributes and the
chunk indexes carry Jenkins lookup3 checksums), every dataset is chunked with the Fletcher-32 filter, text
(JSON records, the run file) is stored as UTF-8 bytes in such datasets and strings as fixed-length
values, never in HDF5's unchecksummed global heap (`infer.store.hdf5io`). A run of zero-filled steps
(what a lost write looks like after a host crash) is also refused. `infer.store.salvage` copies the
longest intact prefix of a damaged file into a new one. Files need HDF5 ≥ 1.10 (2017) to read.

`ChainStore` is the file implementation of `infer.store.base.ChainBackend`; `infer.store.memory` is the
other one.

The cost is one file copy per checkpoint (``sendfile``; a 1 GB chain copies in about a second on a local
disk), which is why checkpoints are spaced in steps or minutes.

Layout, format_version 2 (names are the project's own; T steps, E ensembles, W walkers, P sampled, D derived;
"text" = UTF-8 bytes in a (n,) uint8 dataset, JSON unless said otherwise):

=============================  ==================  ==========================================================
path                           shape / type        meaning
=============================  ==================  ==========================================================
``/`` attrs                                        ``format`` = "infer-chain", ``format_version``, ``steps_done``,
                                                   ``ensembles``, ``walkers``, ``created``, ``infer_version``
``/draws/position``            (T, E, W, P) f8     walker positions after each step
``/draws/log_post``            (T, E, W) f8        ln posterior
``/draws/log_like``            (T, E, W) f8        ln likelihood
``/draws/derived``             (T, E, W, D) f8     derived quantities (``/names/derived``)
``/names/sampled``             (P,) fixed str      sampled parameter names, vector order
``/names/derived``             (D,) fixed str      derived names
``/names/tex``                 text                LaTeX label per name
``/names/bounds``              (P, 2) f8           prior support per sampled parameter
``/start/position``            (E, W, P) f8        the starting ball (step 0), with ``log_post`` and ``blobs``
``/resume/rng_key`` etc.                           each ensemble's random state after step ``steps_done``
``/convergence/*``             (checks,) f8        step, rhat_max, ess_bulk_min, ess_tail_min, tau_max, met
``/provenance/KEY``            text                run-file text and path, dataset path and SHA-256, theory
                                                   settings, package versions, host (one JSON value each)
``/run/events``                text                start / resume / stop / salvage records, allowed changes
``/run/rejections``            text                count of −∞ points by reason
``/run/failures``              text                points whose theory process died, with how
``/run`` attrs                                     ``stop_reason`` of the last session
=============================  ==================  ==========================================================

Files of format_version 1 (variable-length strings, provenance as attributes) are still read.
"""
from __future__ import annotations

import gc
import glob
import os
import shutil
import sys
import time

import h5py
import numpy as np

from infer import __version__
from infer.analysis.samples import DRAWS, Samples
from infer.atomic import fsync_path
from infer.errors import ChainFileError
from infer.sampling.state import BlobLayout, StepState
from infer.store.base import CONVERGENCE, ChainBackend, ChainState, check_draws
from infer.store.hdf5io import (attr_str, bytes_attr, checked, errno_of, fixed_strs, get_json, io_error,
                                provenance_from, put_json, short, strs_from)

FORMAT = "infer-chain"
FORMAT_VERSION = 2
LIBVER = ("v110", "v110")        # checksummed metadata; readable by HDF5 >= 1.10
RNG_KEYS = ("rng_key", "rng_pos", "rng_has_gauss", "rng_gauss")
__all__ = ["ChainStore", "ChainState", "DRAWS", "CONVERGENCE", "FORMAT", "FORMAT_VERSION", "zero_steps",
           "rng_to_arrays", "rng_from_arrays"]


def rng_to_arrays(states):
    return {"rng_key": np.array([s[1] for s in states], dtype=np.uint32),
            "rng_pos": np.array([s[2] for s in states], dtype=np.int64),
            "rng_has_gauss": np.array([s[3] for s in states], dtype=np.int64),
            "rng_gauss": np.array([s[4] for s in states], dtype=np.float64)}


def rng_from_arrays(g):
    key, pos, hg, ga = (np.asarray(g[k][()]) for k in RNG_KEYS)
    if key.shape != (len(pos), 624) or not len(pos) == len(hg) == len(ga):
        raise ValueError(f"random states of inconsistent shapes {key.shape}, {pos.shape}")
    return [("MT19937", key[e].astype(np.uint32), int(pos[e]), int(hg[e]), float(ga[e])) for e in range(len(pos))]


def zero_steps(position, log_post) -> np.ndarray:
    """Indices of steps whose positions and ln p are all exactly zero: lost writes, never a real step."""
    if not len(log_post):
        return np.zeros(0, dtype=int)
    flat_p = position.reshape(len(position), -1)
    flat_l = log_post.reshape(len(log_post), -1)
    return np.flatnonzero(~flat_p.any(axis=1) & ~flat_l.any(axis=1))


class ChainStore(ChainBackend):
    """A chain file on disk. Writers must hold a `infer.store.lock.ChainLock` on the same path."""

    def __init__(self, path: str):
        self.path = os.path.abspath(path)

    # -- writing -------------------------------------------------------------------------------------
    def _tmp(self):
        d, b = os.path.split(self.path)
        return os.path.join(d, f".{b}.tmp-{os.getpid()}")

    def remove_strays(self) -> None:
        """Delete temporary files left by killed writers (call only while holding the lock)."""
        d, b = os.path.split(self.path)
        for stray in glob.glob(os.path.join(glob.escape(d), f".{glob.escape(b)}.tmp-*")):
            try:
                os.unlink(stray)
            except OSError:
                pass

    def _commit(self, mutate, verify, create=False) -> None:
        """Copy → mutate the copy → flush → read back and verify → fsync → atomic rename → fsync the folder.

        HDF5 reports some write failures only when it evicts a cached chunk, from an object's destructor,
        where Python can merely print them ("Exception ignored in ..."): so the chunk cache is off (every
        write reaches the file at once and fails there), such swallowed errors are collected and count
        as a failure, and the copy is read back and compared with what was meant before it is published.
        Any failure removes the copy and leaves the published file as it was; an I/O error (disk full,
        read-only or vanished folder, quota) becomes one `ChainFileError` line."""
        tmp = self._tmp()
        swallowed: list = []
        old_hook = sys.unraisablehook

        def hook(u):
            if "h5py" in repr(u.object) or errno_of(u.exc_value) is not None:
                swallowed.append(u.exc_value)
            else:
                old_hook(u)

        sys.unraisablehook = hook
        try:
            if not create:
                shutil.copyfile(self.path, tmp)
                try:
                    shutil.copymode(self.path, tmp)
                except OSError:
                    pass
            with h5py.File(tmp, "w" if create else "r+", locking=False, libver=LIBVER, rdcc_nbytes=0) as f:
                mutate(f)
                f.flush()
            gc.collect()                         # run any pending h5py destructors inside the guard
            if swallowed:
                raise io_error(swallowed[0])
            with h5py.File(tmp, "r", locking=False) as f:
                verify(f)
            if swallowed:
                raise io_error(swallowed[0])
            fsync_path(tmp)
            os.replace(tmp, self.path)
            fsync_path(os.path.dirname(self.path), directory=True)
        except BaseException as err:
            try:
                os.unlink(tmp)
            except OSError:
                pass
            if isinstance(err, _VerifyError):
                raise ChainFileError(f"{self.path}: cannot write the checkpoint (the new copy did not read back "
                                     f"as written: {err}); the file on disk still holds the previous "
                                     "checkpoint") from None
            if isinstance(err, Exception) and not isinstance(err, OSError) and errno_of(err) is not None:
                err = io_error(err)
            if not isinstance(err, OSError):
                raise
            code = errno_of(err)
            what = os.strerror(code) if code else (getattr(err, "strerror", None) or short(err))
            if create:
                tail = "nothing was written"
            elif os.path.exists(self.path):
                tail = "the file on disk still holds the previous checkpoint"
            else:
                tail = "the chain file or its folder has disappeared"
            raise ChainFileError(f"{self.path}: cannot write the checkpoint ({what}); {tail}") from None
        finally:
            sys.unraisablehook = old_hook

    def create(self, *, names, derived_names, tex, bounds, start: StepState, provenance, draws=None, rng=None,
               events=None, rejections=None, failures=None, convergence=None, stop_reason=None) -> None:
        """Write a new chain file in one atomic commit: its metadata, starting ball and random states,
        and (used by `infer.salvage`) optionally steps already taken (``draws``) with ``rng`` after them."""
        P, D = len(names), len(derived_names)
        E, W = start.ensembles, start.walkers
        rng = start.rng if rng is None else rng
        tails = {"position": (E, W, P), "log_post": (E, W), "log_like": (E, W), "derived": (E, W, D)}
        d = draws if draws is not None else {k: np.empty((0,) + tails[k]) for k in DRAWS}
        check_draws(d, E, W, P, D)
        chunk = max(1, min(512, (1 << 18) // max(1, E * W * (P + D + 2) * 8)))
        start_arrays = {"position": start.position, "log_post": start.log_post, "blobs": start.blobs}

        def build(f):
            f.attrs.update({"format": bytes_attr(FORMAT), "format_version": FORMAT_VERSION, "steps_done": 0,
                            "ensembles": E, "walkers": W,
                            "created": bytes_attr(time.strftime("%Y-%m-%dT%H:%M:%S%z")),
                            "infer_version": bytes_attr(__version__)})
            g = f.create_group("draws")
            for name in DRAWS:
                tail = tails[name]
                g.create_dataset(name, shape=(0,) + tail, maxshape=(None,) + tail, dtype="f8",
                                 chunks=(chunk,) + tail, fletcher32=True)
            n = f.create_group("names")
            checked(n, "sampled", fixed_strs(names))
            checked(n, "derived", fixed_strs(derived_names))
            put_json(n, "tex", tex)
            checked(n, "bounds", np.array([bounds[k] for k in names], float).reshape(P, 2))
            s = f.create_group("start")
            for key in ("position", "log_post", "blobs"):
                checked(s, key, np.asarray(start_arrays[key], float))
            r = f.create_group("resume")
            for key, arr in rng_to_arrays(rng).items():
                checked(r, key, arr)
            c = f.create_group("convergence")
            for key in CONVERGENCE:
                c.create_dataset(key, shape=(0,), maxshape=(None,), dtype="f8", chunks=(256,), fletcher32=True)
            p = f.create_group("provenance")
            for key, val in provenance.items():
                put_json(p, key, val.item() if isinstance(val, np.generic) else val)
            run = f.create_group("run")
            put_json(run, "events", [])
            put_json(run, "rejections", {})
            put_json(run, "failures", [])
            self._grow(f, d, rng, convergence, events, rejections, failures, stop_reason)

        def verify(f):
            _verify_tail(f, 0, d, rng)
            for key in ("position", "log_post", "blobs"):
                if not np.array_equal(f["start"][key][()], np.asarray(start_arrays[key], float), equal_nan=True):
                    raise _VerifyError(f"/start/{key} differs")

        try:
            os.makedirs(os.path.dirname(self.path), exist_ok=True)
        except OSError as err:
            raise ChainFileError(f"{os.path.dirname(self.path)}: cannot create the folder ({err.strerror})") from None
        self._commit(build, verify, create=True)

    @staticmethod
    def _grow(f, draws, rng, convergence, events, rejections, failures, stop_reason):
        done = int(f.attrs["steps_done"])
        g = f["draws"]
        E, W, P = g["position"].shape[1:]
        n = check_draws(draws, E, W, P, g["derived"].shape[3])
        for name in DRAWS:
            ds = g[name]
            ds.resize(done + n, axis=0)
            if n:
                ds[done:done + n] = draws[name]
        for key, arr in rng_to_arrays(rng).items():
            f["resume"][key][...] = arr
        if convergence:
            c = f["convergence"]
            m = len(c["step"])
            for key in CONVERGENCE:
                c[key].resize(m + len(convergence), axis=0)
                c[key][m:] = [row[key] for row in convergence]
        run = f["run"]
        if events:
            put_json(run, "events", get_json(run["events"]) + list(events))
        if rejections is not None:
            put_json(run, "rejections", rejections)
        if failures is not None:
            put_json(run, "failures", failures)
        if stop_reason is not None:
            run.attrs["stop_reason"] = bytes_attr(stop_reason)
        f.attrs["steps_done"] = done + n

    def append(self, draws, rng, *, convergence=None, events=None, rejections=None, failures=None,
               stop_reason=None) -> int:
        """Atomically add ``n`` steps (`DRAWS` arrays shaped (n, E, W, ...)) and the state after them."""
        before = {}

        def grow(f):
            before["done"] = int(f.attrs["steps_done"])
            self._grow(f, draws, rng, convergence, events, rejections, failures, stop_reason)

        self._commit(grow, lambda f: _verify_tail(f, before["done"], draws, rng))
        return len(draws["position"])

    def steps_done(self) -> int:
        """Steps in the published file (reads one attribute); ChainFileError if it cannot be read."""
        try:
            with h5py.File(self.path, "r", locking=False) as f:
                return int(f.attrs["steps_done"])
        except (OSError, KeyError, ValueError) as err:
            raise ChainFileError(f"{self.path}: cannot read the chain file ({short(err)})") from None

    # -- reading -------------------------------------------------------------------------------------
    def read(self, verify: bool = True) -> ChainState:
        """Read the whole chain; ChainFileError naming the problem if it is not a sound chain file.

        ``verify`` also refuses zero-filled steps (lost writes)."""
        if not os.path.exists(self.path):
            raise ChainFileError(f"{self.path}: no such chain file")
        if os.path.isdir(self.path):
            raise ChainFileError(f"{self.path}: is a folder, not a chain file")
        try:
            f = h5py.File(self.path, "r", locking=False)
        except OSError as err:
            raise ChainFileError(f"{self.path}: damaged or not an HDF5 file ({short(err)}); "
                                 f"{_salvage_hint(self.path)}") from None
        try:
            with f:
                return self._read(f, verify)
        except ChainFileError:
            raise
        except Exception as err:      # h5py reports damage as OSError, KeyError, ValueError, ...
            raise ChainFileError(f"{self.path}: damaged chain file ({err.__class__.__name__}: {short(err)}); "
                                 f"{_salvage_hint(self.path)}") from None

    def _read(self, f, verify=True) -> ChainState:
        fmt = attr_str(f, "format")
        if fmt != FORMAT:
            raise ChainFileError(f"{self.path}: not an infer chain file (format attribute is {fmt!r})")
        if int(f.attrs.get("format_version", -1)) > FORMAT_VERSION:
            raise ChainFileError(f"{self.path}: written by a newer infer (format_version "
                                 f"{f.attrs['format_version']}); upgrade infer to read it")
        T = int(f.attrs["steps_done"])
        E, W = int(f.attrs["ensembles"]), int(f.attrs["walkers"])
        names = strs_from(f["names/sampled"])
        dnames = strs_from(f["names/derived"])
        P, D = len(names), len(dnames)
        expect = {"position": (T, E, W, P), "log_post": (T, E, W), "log_like": (T, E, W), "derived": (T, E, W, D)}
        arrays = {}
        for k in DRAWS:
            ds = f["draws"][k]
            if ds.shape != expect[k]:
                raise ChainFileError(f"{self.path}: inconsistent chain: /draws/{k} has shape {ds.shape}, "
                                     f"expected {expect[k]} from the file's steps_done, ensembles, walkers "
                                     f"and names; {_salvage_hint(self.path)}")
            arrays[k] = ds[()]
        if verify:
            zeros = zero_steps(arrays["position"], arrays["log_post"])
            if len(zeros):
                raise ChainFileError(f"{self.path}: damaged chain file: step {zeros[0] + 1} is all zeros "
                                     f"(a lost write); {_salvage_hint(self.path)}")
        bounds = {n: tuple(b) for n, b in zip(names, f["names/bounds"][()].tolist())}
        tex = get_json(f["names/tex"])
        prov = provenance_from(f["provenance"])
        run = f["run"]
        samples = Samples.from_draws(names, dnames, arrays, tex=tex, bounds=bounds,
                                     meta={"chain": self.path, "stop_reason": attr_str(run, "stop_reason", "") or ""})
        start = {k: f["start"][k][()] for k in ("position", "log_post", "blobs")}
        if (start["position"].shape != (E, W, P) or start["log_post"].shape != (E, W)
                or start["blobs"].shape != (E, W, 1 + D)):
            raise ChainFileError(f"{self.path}: inconsistent chain: /start has shape {start['position'].shape}, "
                                 f"expected {(E, W, P)}")
        rng = rng_from_arrays(f["resume"])
        if len(rng) != E:
            raise ChainFileError(f"{self.path}: inconsistent chain: {len(rng)} random states for {E} ensembles")
        conv = {k: f["convergence"][k][()] for k in CONVERGENCE}
        if len({len(v) for v in conv.values()}) > 1:
            raise ChainFileError(f"{self.path}: inconsistent chain: /convergence datasets differ in length")
        start = StepState.from_blobs(start["position"], start["log_post"], start["blobs"], BlobLayout(dnames),
                                     rng if T == 0 else None)
        return ChainState(samples, start, rng, prov, get_json(run["events"]), get_json(run["rejections"]),
                          get_json(run["failures"]), conv)


class _VerifyError(Exception):
    pass


def _verify_tail(f, done, draws, rng):
    """The file holds ``done`` + n steps, ends with ``draws`` and has ``rng`` as its random states."""
    n = len(draws["position"])
    if int(f.attrs["steps_done"]) != done + n:
        raise _VerifyError(f"steps_done is {int(f.attrs['steps_done'])}, expected {done + n}")
    for k in DRAWS:
        ds = f["draws"][k]
        if ds.shape[0] != done + n:
            raise _VerifyError(f"/draws/{k} has {ds.shape[0]} steps, expected {done + n}")
        if n and not np.array_equal(ds[done:done + n], np.asarray(draws[k], float).reshape(ds[done:done + n].shape),
                                    equal_nan=True):
            raise _VerifyError(f"/draws/{k} differs")
    for key, arr in rng_to_arrays(rng).items():
        if not np.array_equal(f["resume"][key][()], arr):
            raise _VerifyError(f"/resume/{key} differs")


def _salvage_hint(path) -> str:
    return f"copy its intact part into a new file with `infer salvage {path} NEW.h5`"
