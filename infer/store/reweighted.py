"""The file of a reweighted chain: a finished chain's draws with new importance weights, its parent and the change.

Written once by ``infer reweight`` (`infer.analysis.reweight`), never appended to, with the same crash
safety as the chain files: the file is built under a temporary name, read back and compared with what was
meant, fsynced and renamed over the target name (`infer.store.chainfile.ChainStore._commit`); every
dataset is chunked with the Fletcher-32 filter and the HDF5 1.10 metadata checksums are on. The root
attribute ``format = "infer-reweighted"`` differs from a chain file's, so ``infer resume`` and ``infer
status`` refuse it in one line instead of treating it as a run to continue.

Why not the surrogate engine's chain file (`infer.store.enginefile`), which also holds weighted exact
draws: its ``/exact`` log is the replay log of an engine run (stages fit / design / correction) and
``infer resume`` would re-run the engine over it, and its report is the engine's (rounds, surrogate
accuracy, proposal chain); a reweighted sample has none of these.

Layout, format_version 1 (n draws, P sampled, D derived; "text" = UTF-8 bytes, JSON unless said otherwise):

=============================  ===============  ==================================================================
path                           shape / type     meaning
=============================  ===============  ==================================================================
``/`` attrs                                     ``format`` = "infer-reweighted", ``format_version``, ``created``,
                                                ``infer_version``, ``change`` (kind of change, see `CHANGES`)
``/names/sampled``             (P,) str         sampled parameters, the parent's order
``/names/derived``             (D,) str         derived quantities of the new sample (… and ``chi2``)
``/names/tex``, ``/names/bounds``               labels (text), prior support of the target (P, 2)
``/sample/position``           (n, P) f8        the parent's draws
``/sample/log_post``           (n,) f8          ln posterior of the target (−∞: zero weight)
``/sample/log_like``           (n,) f8          ln likelihood of the target
``/sample/derived``            (n, D) f8        derived quantities (recomputed when the theory was called)
``/sample/log_weight``         (n,) f8          unnormalised ln importance weight under the target
``/sample/log_post_parent``    (n,) f8          ln posterior the parent chain stored at the draw
``/sample/origin``             (n, 3) i8        where the draw sits in the parent: (step, ensemble, walker) of
                                                an ensemble chain, (row, −1, −1) of a weighted sample
``/sample/reasons``            text             JSON list: null, or why the target gave the draw ln p = −∞
``/parent``                    text             path, SHA-256 of its bytes, ``created`` stamp, run name, kind,
                                                steps or draws, burn-in and thinning used
``/change``                    text             kind, target run file (text and path), added priors
``/report``                    text             Kish ESS, k̂, thresholds, draws, exact calls, seconds, verdict
``/provenance/KEY``            text             the provenance record the summary reads (the target run file's
                                                when the target replaces the posterior, else the parent's)
=============================  ===============  ==================================================================

The exact calls of an unfinished reweighting (stopped by a signal, killed, or refused for its weights) are
kept in a checkpoint of the same format beside the output (``.NEW.h5.partial``, `infer.commands.reweight`):
the root attribute ``complete`` = 0 and, instead of ``/sample``, ``/partial``: ``done`` (n,) i1,
``log_post`` (n,), ``blobs`` (n, B) and ``reasons`` of the exact calls so far, ``blob_names``, and ``key``,
the JSON record (parent SHA-256, change, draw selection) that a rerun of the same command must match to
continue from it. The readers of finished files (`ReweightedFile.read`, the summary) refuse it in one line.
"""
from __future__ import annotations

import os
import time
from dataclasses import dataclass, field

import h5py
import numpy as np

from infer import __version__
from infer.errors import ChainFileError
from infer.store.chainfile import ChainStore, _VerifyError
from infer.store.hdf5io import (attr_str, bytes_attr, checked, fixed_strs, get_json, provenance_from, put_json,
                                short, strs_from)

FORMAT = "infer-reweighted"
FORMAT_VERSION = 1
#: Kinds of change: a target run file replacing the posterior, its dataset's likelihood added to the
#: parent's, added priors only; "+prior" is appended when priors are added to a run-file change.
CHANGES = ("run-file", "add-data", "prior", "run-file+prior", "add-data+prior")
ARRAYS = ("position", "log_post", "log_like", "derived", "log_weight", "log_post_parent")


@dataclass
class Reweighted:
    """Everything in a reweighted-chain file, read into memory."""
    names: tuple
    derived_names: tuple
    tex: dict
    bounds: dict
    sample: dict                       # ARRAYS, and "origin" (n, 3) int
    reasons: list
    parent: dict
    change: dict
    report: dict
    provenance: dict
    created: str = ""
    meta: dict = field(default_factory=dict)

    @property
    def draws(self) -> int:
        return len(self.sample["log_weight"])

    def weighted_sample(self, meta=None):
        """The `infer.analysis.weighted.WeightedSample` the summary reads."""
        from infer.analysis.weighted import WeightedSample
        s = self.sample
        return WeightedSample(self.names, self.derived_names, s["position"], s["derived"], s["log_post"],
                              s["log_like"], s["log_weight"], dict(self.tex), dict(self.bounds), dict(meta or {}))


@dataclass
class Partial:
    """The exact calls of an unfinished reweighting: ``done`` (n,) bool, ``log_post`` (n,), ``blobs`` (n, B)."""
    key: dict
    done: np.ndarray
    log_post: np.ndarray
    blobs: np.ndarray
    reasons: list
    blob_names: tuple


def is_reweighted(path) -> bool:
    """Whether ``path`` is a reweighted-chain file (reads one attribute; False for anything else)."""
    try:
        with h5py.File(path, "r", locking=False) as f:
            return attr_str(f, "format") == FORMAT
    except (OSError, ValueError):
        return False


class ReweightedFile(ChainStore):
    """A reweighted-chain file on disk (written in one atomic commit)."""

    def write(self, rw: Reweighted) -> None:
        """Write ``rw`` in one commit (over an existing file only through the atomic rename)."""
        s = rw.sample
        n, P, D = len(s["log_weight"]), len(rw.names), len(rw.derived_names)
        arrays = {k: np.asarray(s[k], float) for k in ARRAYS}
        arrays["origin"] = np.asarray(s["origin"], np.int64).reshape(n, 3)
        expect = {"position": (n, P), "derived": (n, D), "origin": (n, 3)}
        for k, a in arrays.items():
            if a.shape != expect.get(k, (n,)):
                raise ValueError(f"reweighted sample: {k} has shape {a.shape}, expected {expect.get(k, (n,))}")
        if len(rw.reasons) != n:
            raise ValueError(f"reweighted sample: {len(rw.reasons)} reasons for {n} draws")

        def build(f):
            f.attrs.update({"format": bytes_attr(FORMAT), "format_version": FORMAT_VERSION, "complete": 1,
                            "created": bytes_attr(time.strftime("%Y-%m-%dT%H:%M:%S%z")),
                            "infer_version": bytes_attr(__version__), "change": bytes_attr(rw.change["kind"])})
            g = f.create_group("names")
            checked(g, "sampled", fixed_strs(rw.names))
            checked(g, "derived", fixed_strs(rw.derived_names))
            put_json(g, "tex", rw.tex)
            checked(g, "bounds", np.array([rw.bounds[k] for k in rw.names], float).reshape(P, 2))
            g = f.create_group("sample")
            for k, a in arrays.items():
                checked(g, k, a)
            put_json(g, "reasons", list(rw.reasons))
            put_json(f, "parent", rw.parent)
            put_json(f, "change", rw.change)
            put_json(f, "report", rw.report)
            p = f.create_group("provenance")
            for key, val in rw.provenance.items():
                put_json(p, key, val.item() if isinstance(val, np.generic) else val)

        def verify(f):
            for k, a in arrays.items():
                if not np.array_equal(f["sample"][k][()], a, equal_nan=True):
                    raise _VerifyError(f"/sample/{k} differs")

        if rw.change.get("kind") not in CHANGES:
            raise ValueError(f"unknown change kind {rw.change.get('kind')!r}")
        self._commit(build, verify, create=True)

    def write_partial(self, part: Partial) -> None:
        """Write (or replace, atomically) the checkpoint of an unfinished reweighting."""
        arrays = {"done": np.asarray(part.done, np.int8), "log_post": np.asarray(part.log_post, float),
                  "blobs": np.asarray(part.blobs, float)}

        def build(f):
            f.attrs.update({"format": bytes_attr(FORMAT), "format_version": FORMAT_VERSION, "complete": 0,
                            "created": bytes_attr(time.strftime("%Y-%m-%dT%H:%M:%S%z")),
                            "infer_version": bytes_attr(__version__)})
            g = f.create_group("partial")
            for k, a in arrays.items():
                checked(g, k, a)
            checked(g, "blob_names", fixed_strs(part.blob_names))
            put_json(g, "reasons", list(part.reasons))
            put_json(g, "key", part.key)

        def verify(f):
            for k, a in arrays.items():
                if not np.array_equal(f["partial"][k][()], a, equal_nan=True):
                    raise _VerifyError(f"/partial/{k} differs")

        self._commit(build, verify, create=True)

    def read_partial(self) -> Partial | None:
        """The checkpoint of an unfinished reweighting, or None when the file is a finished one."""
        try:
            with h5py.File(self.path, "r", locking=False) as f:
                if attr_str(f, "format") != FORMAT:
                    raise ChainFileError(f"{self.path}: not a reweighted chain file")
                if int(f.attrs.get("complete", 1)):
                    return None
                g = f["partial"]
                return Partial(get_json(g["key"]), g["done"][()].astype(bool), g["log_post"][()], g["blobs"][()],
                               list(get_json(g["reasons"])), strs_from(g["blob_names"]))
        except ChainFileError:
            raise
        except Exception as err:      # noqa: BLE001 - h5py reports damage in many ways
            raise ChainFileError(f"{self.path}: damaged reweighted chain file ({err.__class__.__name__}: "
                                 f"{short(err)}); remove it or pass --replace") from None

    def read(self, verify: bool = True) -> Reweighted:
        if not os.path.exists(self.path):
            raise ChainFileError(f"{self.path}: no such file")
        try:
            f = h5py.File(self.path, "r", locking=False)
        except OSError as err:
            raise ChainFileError(f"{self.path}: damaged or not an HDF5 file ({short(err)})") from None
        try:
            with f:
                if attr_str(f, "format") != FORMAT:
                    raise ChainFileError(f"{self.path}: not a reweighted chain file")
                if not int(f.attrs.get("complete", 1)):
                    done = int(f["partial/done"][()].sum())
                    raise ChainFileError(f"{self.path}: an unfinished reweighting ({done} of "
                                         f"{len(f['partial/done'])} exact calls done); rerun the same "
                                         "`infer reweight` command to finish it")
                if int(f.attrs.get("format_version", -1)) > FORMAT_VERSION:
                    raise ChainFileError(f"{self.path}: written by a newer infer (format_version "
                                         f"{f.attrs['format_version']}); upgrade infer to read it")
                names = strs_from(f["names/sampled"])
                sample = {k: f["sample"][k][()] for k in ARRAYS + ("origin",)}
                n = len(sample["log_weight"])
                if sample["position"].shape != (n, len(names)) or len(sample["log_post"]) != n:
                    raise ChainFileError(f"{self.path}: inconsistent file: /sample arrays differ in length")
                return Reweighted(names, strs_from(f["names/derived"]), get_json(f["names/tex"]),
                                  {k: tuple(b) for k, b in zip(names, f["names/bounds"][()].tolist())}, sample,
                                  list(get_json(f["sample/reasons"])), get_json(f["parent"]), get_json(f["change"]),
                                  get_json(f["report"]), provenance_from(f["provenance"]),
                                  attr_str(f, "created", "") or "")
        except ChainFileError:
            raise
        except Exception as err:      # h5py reports damage as OSError, KeyError, ValueError, ...
            raise ChainFileError(f"{self.path}: damaged reweighted chain file ({err.__class__.__name__}: "
                                 f"{short(err)})") from None


__all__ = ["FORMAT", "FORMAT_VERSION", "CHANGES", "Partial", "Reweighted", "ReweightedFile", "is_reweighted"]
