"""The run file's ``[dataset]`` table: which file, how to read it, and which bands of it to fit.

Keys (each checked here for type and range, one line naming the run file and the dotted key):

* ``file`` — our HDF5 file (``.h5``/``.hdf5``), a plain-text table (``.txt``/``.dat``/``.csv``, then
  also ``covariance`` and ``units``), or a SACC file (``.fits``/``.fit``/``.sacc``; then also ``units``
  unless the file records them);
* ``units`` — declared units of a plain-text table or a SACC file (one of `infer.data.bandpowers.UNITS`);
* ``spectra`` — a subset of TT/TE/EE/BB;
* ``pairs`` — frequency pairs to keep, spelled ``"90x150"`` (channel names joined by ``x``; for TE the T
  map's channel first);
* ``ell_min``/``ell_max`` — one ℓ range for every band;
* ``ell_ranges`` — ℓ ranges per spectrum kind, or per kind and pair, e.g.
  ``{ TT = [30, 2500], EE = [30, 2000], "TE 90x150" = [50, 1800] }``; the most specific entry wins
  (kind and pair, then kind, then ``ell_min``/``ell_max``).

A band is kept whole when it lies inside its range (cutting inside a band would change its window).
Whether a pair or kind exists in the file is checked when the file is read (`BandPowers.cut`), before any
theory call. Relative paths are relative to the run file's folder.
"""
from __future__ import annotations

import re
from pathlib import Path

from infer import validate
from infer.data.bandpowers import MAX_ELL, UNITS
from infer.errors import UserError
from infer.theory.base import KINDS

DATASET_KEYS = {"file", "covariance", "units", "spectra", "pairs", "ell_min", "ell_max", "ell_ranges"}
PLAIN_SUFFIXES = (".txt", ".dat", ".csv")
#: A pair label: two channel names (no lowercase x) joined by x.
PAIR = re.compile(r"[A-Za-wyz0-9._+-]{1,32}x[A-Za-wyz0-9._+-]{1,32}")


def _ell_range(path, key, value) -> list[int]:
    if not isinstance(value, list) or len(value) != 2:
        raise UserError(f"{path}: '{key}' must be [ell_min, ell_max], got {validate.show(value)}")
    lo, hi = (validate.number(path, key, v, integer=True, low=2, high=MAX_ELL) for v in value)
    if lo > hi:
        raise UserError(f"{path}: '{key}' = [{lo}, {hi}]: ell_min is above ell_max, no band can be kept")
    return [int(lo), int(hi)]


def _ranges(path, table) -> dict[str, list[int]]:
    if not isinstance(table, dict) or not table:
        raise UserError(f"{path}: 'dataset.ell_ranges' must be a table such as {{ TT = [30, 2500] }}, "
                        f"got {validate.show(table)}")
    out = {}
    for key, value in table.items():
        parts = key.split()
        if not (parts and parts[0] in KINDS and (len(parts) == 1 or (len(parts) == 2 and PAIR.fullmatch(parts[1])))):
            raise UserError(f"{path}: 'dataset.ell_ranges' key {key!r} must be a spectrum kind "
                            f"({', '.join(KINDS)}) or a kind and a pair such as \"TE 90x150\"")
        out[" ".join(parts)] = _ell_range(path, f"dataset.ell_ranges.{key}", value)
    return out


def read(path, ds, base: Path, resolve) -> dict:
    """The ``[dataset]`` table checked, with ``file``/``covariance`` resolved by ``resolve(base, value,
    path, key)`` (the run file reader's path rule)."""
    validate.check_keys(path, "dataset", ds, DATASET_KEYS)
    if "file" not in ds:
        raise UserError(f"{path}: missing key 'dataset.file'")
    dataset = dict(ds)
    dataset["file"] = resolve(base, ds["file"], path, "dataset.file")
    plain = Path(dataset["file"]).suffix.lower() in PLAIN_SUFFIXES
    if "covariance" in ds:
        if not plain:
            raise UserError(f"{path}: 'dataset.covariance' is only read for a plain-text dataset "
                            f"(.txt/.dat/.csv); {Path(dataset['file']).name} holds its own covariance")
        dataset["covariance"] = resolve(base, ds["covariance"], path, "dataset.covariance")
    elif plain:
        raise UserError(f"{path}: 'dataset.covariance' is missing: a plain-text dataset needs a "
                        "covariance file (.npy or text)")
    if "units" in ds:
        validate.choice(path, "dataset.units", ds["units"], tuple(UNITS))
    elif plain:
        raise UserError(f"{path}: 'dataset.units' is missing: a plain-text dataset must declare its "
                        f"units (one of {', '.join(UNITS)})")
    if "spectra" in ds:
        dataset["spectra"] = list(validate.subset(path, "dataset.spectra", ds["spectra"], KINDS))
    if "pairs" in ds:
        pairs = ds["pairs"]
        if not isinstance(pairs, list) or not pairs or not all(isinstance(p, str) for p in pairs):
            raise UserError(f"{path}: 'dataset.pairs' must be a non-empty list of pairs such as \"90x150\", "
                            f"got {validate.show(pairs)}")
        bad = [p for p in pairs if not PAIR.fullmatch(p)]
        if bad:
            raise UserError(f"{path}: 'dataset.pairs' entry {bad[0]!r} is not a pair of channel names "
                            "joined by 'x' (e.g. \"90x150\")")
        if len(set(pairs)) != len(pairs):
            raise UserError(f"{path}: 'dataset.pairs' names a pair twice")
        dataset["pairs"] = list(pairs)
    for key in ("ell_min", "ell_max"):
        if key in ds:
            validate.number(path, f"dataset.{key}", ds[key], integer=True, low=2, high=MAX_ELL)
    if "ell_min" in ds and "ell_max" in ds and ds["ell_min"] > ds["ell_max"]:
        raise UserError(f"{path}: 'dataset.ell_min' = {ds['ell_min']} is above 'dataset.ell_max' = "
                        f"{ds['ell_max']}: no band can be kept")
    if "ell_ranges" in ds:
        dataset["ell_ranges"] = _ranges(path, ds["ell_ranges"])
    return dataset


def cut(data, dataset: dict):
    """``data`` cut to the bands the ``[dataset]`` table selects."""
    return data.cut(spectra=dataset.get("spectra"), pairs=dataset.get("pairs"), ell_min=dataset.get("ell_min"),
                    ell_max=dataset.get("ell_max"), ell_ranges=dataset.get("ell_ranges"))


__all__ = ["DATASET_KEYS", "read", "cut"]
