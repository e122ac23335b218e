"""The chain file of a surrogate-engine run: every exact call as it completes, then the weighted sample.

Same file kind and the same crash safety as the ensemble chain file (`infer.store.chainfile`): one HDF5
file, never modified in place — each commit copies it, changes the copy, reads it back, fsyncs and
renames it over the old name — with every dataset Fletcher-32-checked and the HDF5 1.10 metadata
checksums. The root attribute ``engine = "surrogate"`` tells the readers which layout follows.

Layout (n exact calls, P sampled, B blob fields of an exact call, m weighted draws, D derived):

==============================  ===============  ==================================================================
path                            shape / type     meaning
==============================  ===============  ==================================================================
``/`` attrs                                      ``format`` = "infer-chain", ``format_version``, ``engine`` =
                                                 "surrogate", ``calls_done``, ``created``, ``infer_version``
``/names/sampled``              (P,) str         sampled parameters
``/names/blob``                 (B,) str         fields of an exact call's blob (model band powers, derived)
``/names/derived``              (D,) str         derived quantities of the weighted sample (… and ``chi2``)
``/names/tex``, ``/names/bounds``                labels (text), prior support (P, 2)
``/exact/position``             (n, P) f8        every exact call, in call order (the replay log,
``/exact/log_post``             (n,) f8          `infer.sampling.exactlog`): point, ln posterior,
``/exact/blob``                 (n, B) f8        blob, and the stage that asked for it
``/exact/stage``                (n,) i8          (1 fit, 2 design, 3 correction)
``/exact/reasons``              text             JSON list: null, or why the point got ln p = −∞
``/sample/position`` etc.       (m, …) f8        the weighted sample: ``position``, ``log_post``, ``log_like``,
                                                 ``derived``, ``log_weight`` (unnormalised ln w)
``/sample/report``              text             JSON: weight ESS, k̂, ln Z ± error, rounds, surrogate accuracy,
                                                 surrogate-chain verdict, Laplace mean and covariance, verdict
``/provenance/KEY``             text             as in the ensemble chain file
``/run/events``                 text             start / resume / stop records
==============================  ===============  ==================================================================

The weighted sample is derived from the exact calls and rewritten whenever the run stops, so a kill
loses nothing that a resume cannot rebuild.
"""
from __future__ import annotations

import os
import time
from dataclasses import dataclass, field

import h5py
import numpy as np

from infer import __version__
from infer.errors import ChainFileError
from infer.sampling.exactlog import STAGES, Rows
from infer.store.chainfile import FORMAT, FORMAT_VERSION, ChainStore, _VerifyError
from infer.store.hdf5io import (attr_str, bytes_attr, checked, fixed_strs, get_json, provenance_from, put_json,
                                short, strs_from)

ENGINE = "surrogate"
SAMPLE = ("position", "log_post", "log_like", "derived", "log_weight")


@dataclass
class EngineState:
    """Everything in an engine chain file, read into memory."""
    names: tuple
    blob_names: tuple
    derived_names: tuple
    tex: dict
    bounds: dict
    rows: Rows
    provenance: dict
    events: list = field(default_factory=list)
    sample: dict | None = None                 # SAMPLE arrays, when the run has stopped at least once
    report: dict | None = None
    stop_reason: str = ""
    progress: dict | None = None               # the writer's last record: stage, calls, ESS, k̂, ETA

    @property
    def calls_done(self) -> int:
        return len(self.rows)


def engine_of(path) -> str | None:
    """The ``engine`` attribute of a chain file (None for an ensemble chain or an unreadable file)."""
    try:
        with h5py.File(path, "r", locking=False) as f:
            return attr_str(f, "engine")
    except (OSError, ValueError):
        return None


class EngineFile(ChainStore):
    """A surrogate-engine chain file (a backend of `infer.sampling.exactlog.ExactLog`). Writers hold the
    chain's `infer.store.lock.ChainLock`."""

    def create(self, *, names, blob_names, derived_names, tex, bounds, provenance, events=()) -> None:
        P, B = len(names), len(blob_names)

        def build(f):
            f.attrs.update({"format": bytes_attr(FORMAT), "format_version": FORMAT_VERSION,
                            "engine": bytes_attr(ENGINE), "calls_done": 0,
                            "created": bytes_attr(time.strftime("%Y-%m-%dT%H:%M:%S%z")),
                            "infer_version": bytes_attr(__version__)})
            n = f.create_group("names")
            checked(n, "sampled", fixed_strs(names))
            checked(n, "blob", fixed_strs(blob_names))
            checked(n, "derived", fixed_strs(derived_names))
            put_json(n, "tex", tex)
            checked(n, "bounds", np.array([bounds[k] for k in names], float).reshape(P, 2))
            g = f.create_group("exact")
            chunk = max(1, min(1024, (1 << 17) // max(1, 8 * (P + B + 2))))
            for key, tail, dt in (("position", (P,), "f8"), ("log_post", (), "f8"), ("blob", (B,), "f8"),
                                  ("stage", (), "i8")):
                g.create_dataset(key, shape=(0,) + tail, maxshape=(None,) + tail, dtype=dt, chunks=(chunk,) + tail,
                                 fletcher32=True)
            put_json(g, "reasons", [])
            p = f.create_group("provenance")
            for key, val in provenance.items():
                put_json(p, key, val.item() if isinstance(val, np.generic) else val)
            run = f.create_group("run")
            put_json(run, "events", list(events))

        try:
            os.makedirs(os.path.dirname(self.path), exist_ok=True)
        except OSError as err:
            raise ChainFileError(f"{os.path.dirname(self.path)}: cannot create the folder ({err.strerror})") from None
        self._commit(build, lambda f: None, create=True)

    def rows(self) -> Rows:
        return self.read().rows

    def append(self, rows: Rows, events=()) -> None:
        """Atomically add exact calls (the replay log's backend interface)."""
        before = {}

        def grow(f):
            done = int(f.attrs["calls_done"])
            before["done"] = done
            g = f["exact"]
            n = len(rows)
            for key, arr in (("position", rows.position), ("log_post", rows.log_post), ("blob", rows.blobs),
                             ("stage", rows.stage)):
                ds = g[key]
                ds.resize(done + n, axis=0)
                if n:
                    ds[done:] = arr
            put_json(g, "reasons", get_json(g["reasons"]) + list(rows.reasons))
            if getattr(self, "progress", None):
                put_json(f["run"], "progress", self.progress)
            if events:
                put_json(f["run"], "events", get_json(f["run"]["events"]) + list(events))
            f.attrs["calls_done"] = done + n

        def verify(f):
            done, n = before["done"], len(rows)
            if int(f.attrs["calls_done"]) != done + n:
                raise _VerifyError("calls_done differs")
            for key, arr in (("position", rows.position), ("log_post", rows.log_post), ("blob", rows.blobs)):
                if not np.array_equal(f["exact"][key][done:], arr, equal_nan=True):
                    raise _VerifyError(f"/exact/{key} differs")

        self._commit(grow, verify)

    def write_sample(self, sample: dict, report: dict, stop_reason: str, events=()) -> None:
        """Replace the weighted sample and its report (when a session stops)."""
        def put(f):
            if "sample" in f:
                del f["sample"]
            g = f.create_group("sample")
            for key in SAMPLE:
                arr = np.asarray(sample[key], float)
                g.create_dataset(key, data=arr, chunks=arr.shape if arr.size else None, fletcher32=bool(arr.size),
                                 maxshape=arr.shape)
            put_json(g, "report", report)
            f["run"].attrs["stop_reason"] = bytes_attr(stop_reason)
            if events:
                put_json(f["run"], "events", get_json(f["run"]["events"]) + list(events))

        def verify(f):
            for key in SAMPLE:
                if not np.array_equal(f["sample"][key][()], np.asarray(sample[key], float), equal_nan=True):
                    raise _VerifyError(f"/sample/{key} differs")

        self._commit(put, verify)

    def read(self, verify: bool = True) -> EngineState:
        if not os.path.exists(self.path):
            raise ChainFileError(f"{self.path}: no such chain file")
        try:
            f = h5py.File(self.path, "r", locking=False)
        except OSError as err:
            raise ChainFileError(f"{self.path}: damaged or not an HDF5 file ({short(err)})") from None
        try:
            with f:
                if attr_str(f, "engine") != ENGINE:
                    raise ChainFileError(f"{self.path}: not a surrogate-engine chain file")
                n = int(f.attrs["calls_done"])
                g = f["exact"]
                names = strs_from(f["names/sampled"])
                rows = Rows(g["position"][()], g["log_post"][()], g["blob"][()], g["stage"][()],
                            list(get_json(g["reasons"])))
                if len(rows.position) != n or len(rows.reasons) != n or rows.position.shape[1:] != (len(names),):
                    raise ChainFileError(f"{self.path}: inconsistent chain: /exact holds {len(rows.position)} "
                                         f"calls, calls_done says {n}")
                sample = report = None
                if "sample" in f:
                    sample = {k: f["sample"][k][()] for k in SAMPLE}
                    report = get_json(f["sample"]["report"])
                return EngineState(names, strs_from(f["names/blob"]), strs_from(f["names/derived"]),
                                   get_json(f["names/tex"]),
                                   {k: tuple(b) for k, b in zip(names, f["names/bounds"][()].tolist())}, rows,
                                   provenance_from(f["provenance"]), get_json(f["run"]["events"]), sample, report,
                                   attr_str(f["run"], "stop_reason", "") or "",
                                   get_json(f["run"]["progress"]) if "progress" in f["run"] else None)
        except ChainFileError:
            raise
        except Exception as err:      # h5py reports damage as OSError, KeyError, ValueError, ...
            raise ChainFileError(f"{self.path}: damaged chain file ({err.__class__.__name__}: {short(err)})") from None


__all__ = ["EngineFile", "EngineState", "engine_of", "ENGINE", "SAMPLE", "STAGES"]
