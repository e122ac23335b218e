"""The chain file: one HDF5 file per run that a hard kill at any instant cannot corrupt.

Design (see the contributor guide for the alternatives we rejected): a published chain file is never
modified in place. A checkpoint copies the current file to a temporary file in the same folder, appends
the new steps there, fsyncs it and atomically renames it over the old name (POSIX ``rename``), then
fsyncs the folder. So at every instant the name points at a complete file holding every step up to the
last completed checkpoint, and nothing else: ``kill -9`` mid-step, mid-copy or mid-flush leaves the old
file (plus a stray ``.NAME.h5.tmp-PID`` that the next writer removes). Readers in other processes open
the file read-only and, because a rename never touches the inode they opened, always see one consistent
checkpoint — the guarantee HDF5's single-writer/multiple-reader mode gives, without its restrictions
(SWMR cannot add datasets or attributes after the writer starts, and a killed SWMR writer still leaves
the superblock marked open). Every dataset carries HDF5's Fletcher-32 checksum filter, so a flipped byte
in the data is detected on read; `salvage` recovers the longest intact prefix into a new file.

The cost is one file copy per checkpoint (fast `copy_file_range`/`sendfile`; a 1 GB chain copies in about
a second on local disk), which is why checkpoints are spaced in steps or minutes.

Layout (names are the project's own; shapes use T steps, E ensembles, W walkers, P sampled, D derived):

=============================  ==================  ==========================================================
path                           shape / type        meaning
=============================  ==================  ==========================================================
``/`` attrs                                        ``format`` = "infer-chain", ``format_version``, ``steps_done``,
                                                   ``ensembles``, ``walkers``, ``created``, ``infer_version``
``/draws/position``            (T, E, W, P) f8     walker positions after each step
``/draws/log_post``            (T, E, W) f8        ln posterior
``/draws/log_like``            (T, E, W) f8        ln likelihood
``/draws/derived``             (T, E, W, D) f8     derived quantities (``/names/derived``)
``/names/sampled``             (P,) str            sampled parameter names, vector order
``/names/derived``             (D,) str            derived names
``/names/tex``                 JSON str            LaTeX label per name
``/names/bounds``              (P, 2) f8           prior support per sampled parameter
``/start/position``            (E, W, P) f8        the starting ball (step 0), with ``log_post`` and ``blobs``
``/resume/rng_key`` etc.                           each ensemble's random state after step ``steps_done``
``/convergence/*``             (checks,) f8        step, rhat_max, ess_bulk_min, ess_tail_min, tau_max, met
``/provenance`` attrs                              run-file text and path, dataset path and SHA-256, theory
                                                   settings, package versions, host
``/run/events``                JSON str            start / resume / stop records, allowed config changes
``/run/rejections``            JSON str            count of −∞ points by reason
``/run/failures``              JSON str            points whose theory process died, with how
=============================  ==================  ==========================================================
"""
from __future__ import annotations

import glob
import json
import os
import shutil
import time
from dataclasses import dataclass, field

import h5py
import numpy as np

from . import __version__
from .errors import ChainFileError
from .samples import Samples

FORMAT = "infer-chain"
FORMAT_VERSION = 1
DRAWS = ("position", "log_post", "log_like", "derived")
CONVERGENCE = ("step", "rhat_max", "ess_bulk_min", "ess_tail_min", "tau_max", "met")


@dataclass
class ChainState:
    """Everything in a chain file, read into memory."""
    samples: Samples
    steps_done: int
    start: dict                         # position (E,W,P), log_post (E,W), blobs (E,W,B)
    rng: list                           # per ensemble: a numpy RandomState state tuple
    provenance: dict
    events: list = field(default_factory=list)
    rejections: dict = field(default_factory=dict)
    failures: list = field(default_factory=list)
    convergence: dict = field(default_factory=dict)

    def last(self):
        """(position (E,W,P), log_post (E,W), blobs (E,W,B)) of the newest stored step."""
        s = self.samples
        if self.steps_done == 0:
            return self.start["position"], self.start["log_post"], self.start["blobs"]
        blobs = np.concatenate([s.log_like[-1][..., None], s.derived[-1]], axis=-1)
        return s.position[-1], s.log_post[-1], blobs


def rng_to_arrays(states):
    return {"rng_key": np.array([s[1] for s in states], dtype=np.uint32),
            "rng_pos": np.array([s[2] for s in states], dtype=np.int64),
            "rng_has_gauss": np.array([s[3] for s in states], dtype=np.int64),
            "rng_gauss": np.array([s[4] for s in states], dtype=np.float64)}


def rng_from_arrays(g):
    key, pos, hg, ga = (np.asarray(g[k][()]) for k in ("rng_key", "rng_pos", "rng_has_gauss", "rng_gauss"))
    return [("MT19937", key[e].astype(np.uint32), int(pos[e]), int(hg[e]), float(ga[e])) for e in range(len(pos))]


def _json(g, name, value):
    if name in g:
        del g[name]
    g.create_dataset(name, data=json.dumps(value))


def _strs(values):
    return np.array([str(v) for v in values], dtype=h5py.string_dtype())


class ChainStore:
    """A chain file on disk. Writers must hold a `infer.lock.ChainLock` on the same path."""

    def __init__(self, path: str):
        self.path = os.path.abspath(path)

    # -- writing -------------------------------------------------------------------------------------
    def _tmp(self):
        d, b = os.path.split(self.path)
        return os.path.join(d, f".{b}.tmp-{os.getpid()}")

    def remove_strays(self) -> None:
        """Delete temporary files left by killed writers (call only while holding the lock)."""
        d, b = os.path.split(self.path)
        for stray in glob.glob(os.path.join(d, f".{b}.tmp-*")):
            try:
                os.unlink(stray)
            except OSError:
                pass

    def _commit(self, mutate, create=False) -> None:
        tmp = self._tmp()
        try:
            if not create:
                shutil.copyfile(self.path, tmp)
            with h5py.File(tmp, "w" if create else "r+", locking=False) as f:
                mutate(f)
            fd = os.open(tmp, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
            os.replace(tmp, self.path)
            dfd = os.open(os.path.dirname(self.path), os.O_RDONLY)
            try:
                os.fsync(dfd)
            finally:
                os.close(dfd)
        except OSError as err:
            try:
                os.unlink(tmp)
            except OSError:
                pass
            what = getattr(err, "strerror", None) or str(err)
            raise ChainFileError(f"{self.path}: cannot write the checkpoint ({what}); the file on disk still "
                                 "holds the previous checkpoint") from None

    def create(self, *, names, derived_names, tex, bounds, ensembles, walkers, start, rng, provenance):
        P, D = len(names), len(derived_names)
        E, W = ensembles, walkers
        chunk = max(1, min(512, (1 << 18) // max(1, E * W * (P + D + 2) * 8)))

        def build(f):
            f.attrs.update({"format": FORMAT, "format_version": FORMAT_VERSION, "steps_done": 0,
                            "ensembles": E, "walkers": W, "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                            "infer_version": __version__})
            g = f.create_group("draws")
            for name, tail in (("position", (E, W, P)), ("log_post", (E, W)), ("log_like", (E, W)),
                               ("derived", (E, W, D))):
                g.create_dataset(name, shape=(0,) + tail, maxshape=(None,) + tail, dtype="f8",
                                 chunks=(chunk,) + tail, fletcher32=True)
            n = f.create_group("names")
            n.create_dataset("sampled", data=_strs(names))
            n.create_dataset("derived", data=_strs(derived_names))
            n.create_dataset("tex", data=json.dumps(tex))
            n.create_dataset("bounds", data=np.array([bounds[k] for k in names], float).reshape(P, 2))
            s = f.create_group("start")
            for key in ("position", "log_post", "blobs"):
                s.create_dataset(key, data=np.asarray(start[key], float), fletcher32=True)
            r = f.create_group("resume")
            for key, arr in rng_to_arrays(rng).items():
                r.create_dataset(key, data=arr, fletcher32=True)
            c = f.create_group("convergence")
            for key in CONVERGENCE:
                c.create_dataset(key, shape=(0,), maxshape=(None,), dtype="f8", chunks=(256,))
            p = f.create_group("provenance")
            for key, val in provenance.items():
                p.attrs[key] = val if isinstance(val, (str, int, float)) else json.dumps(val)
            run = f.create_group("run")
            _json(run, "events", [])
            _json(run, "rejections", {})
            _json(run, "failures", [])

        os.makedirs(os.path.dirname(self.path), exist_ok=True)
        self._commit(build, create=True)

    def append(self, *, position, log_post, log_like, derived, rng, convergence=None, events=None,
               rejections=None, failures=None, stop_reason=None) -> int:
        """Atomically add ``n`` steps (arrays shaped (n, E, W, ...)) and the state after them."""
        n = len(position)

        def grow(f):
            done = int(f.attrs["steps_done"])
            g = f["draws"]
            for name, arr in (("position", position), ("log_post", log_post), ("log_like", log_like),
                              ("derived", derived)):
                ds = g[name]
                ds.resize(done + n, axis=0)
                if n:
                    ds[done:done + n] = arr
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
                _json(run, "events", json.loads(run["events"][()]) + list(events))
            if rejections is not None:
                _json(run, "rejections", rejections)
            if failures is not None:
                _json(run, "failures", failures)
            if stop_reason is not None:
                run.attrs["stop_reason"] = stop_reason
            f.attrs["steps_done"] = done + n

        self._commit(grow)
        return n

    # -- reading -------------------------------------------------------------------------------------
    def read(self, verify: bool = True) -> ChainState:
        """Read the whole chain; ChainFileError naming the problem if it is not a sound chain file."""
        if not os.path.exists(self.path):
            raise ChainFileError(f"{self.path}: no such chain file")
        try:
            f = h5py.File(self.path, "r", locking=False)
        except OSError as err:
            raise ChainFileError(f"{self.path}: damaged or not an HDF5 file ({_short(err)}); "
                                 f"try `infer salvage {self.path} NEW.h5`") from None
        try:
            with f:
                return self._read(f)
        except ChainFileError:
            raise
        except (OSError, KeyError, ValueError, TypeError) as err:
            raise ChainFileError(f"{self.path}: damaged chain file ({_short(err)}); "
                                 f"try `infer salvage {self.path} NEW.h5`") from None

    def _read(self, f) -> ChainState:
        if f.attrs.get("format") != FORMAT:
            raise ChainFileError(f"{self.path}: not an infer chain file (format attribute is "
                                 f"{f.attrs.get('format')!r})")
        if int(f.attrs.get("format_version", -1)) > FORMAT_VERSION:
            raise ChainFileError(f"{self.path}: written by a newer infer (format_version "
                                 f"{f.attrs['format_version']}); upgrade infer to read it")
        T = int(f.attrs["steps_done"])
        arrays = {k: f["draws"][k][()] for k in DRAWS}
        for k, a in arrays.items():
            if a.shape[0] != T:
                raise ChainFileError(f"{self.path}: inconsistent chain: /draws/{k} has {a.shape[0]} steps, "
                                     f"the file says {T}")
        names = tuple(s.decode() if isinstance(s, bytes) else s for s in f["names/sampled"][()])
        dnames = tuple(s.decode() if isinstance(s, bytes) else s for s in f["names/derived"][()])
        bounds = {n: tuple(b) for n, b in zip(names, f["names/bounds"][()].tolist())}
        tex = json.loads(f["names/tex"][()])
        prov = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f["provenance"].attrs.items()}
        run = f["run"]
        samples = Samples(names, dnames, arrays["position"], arrays["derived"], arrays["log_post"],
                          arrays["log_like"], tex, bounds,
                          {"chain": self.path, "stop_reason": run.attrs.get("stop_reason", "")})
        start = {k: f["start"][k][()] for k in ("position", "log_post", "blobs")}
        conv = {k: f["convergence"][k][()] for k in CONVERGENCE}
        return ChainState(samples, T, start, rng_from_arrays(f["resume"]), prov,
                          json.loads(run["events"][()]), json.loads(run["rejections"][()]),
                          json.loads(run["failures"][()]), conv)


def _short(err) -> str:
    return str(err).splitlines()[0][:200]
