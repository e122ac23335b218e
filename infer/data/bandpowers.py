"""Band-power datasets: read, check, convert once to D_ℓ in μK², write.

A dataset is what an experiment hands to a likelihood: N band powers grouped by spectrum kind
(TT, TE, EE, BB), each with its multipole range, a bandpower window function and one N×N covariance
across all bands and kinds. The model prediction of band b is the window-weighted sum of the theory
spectrum (bandpower window functions: Knox 1999, Phys. Rev. D 60, 103516 — cited from memory),

    B_b = Σ_ℓ W_bℓ X_ℓ ,

where X_ℓ is the spectrum the file's units declare (D_ℓ = ℓ(ℓ+1)C_ℓ/2π or C_ℓ). A band power is a
weighted mean of the spectrum, so each band's weights sum to one (Σ_ℓ W_bℓ = 1 within 1e-3) in the
declared units.

Units are declared by the file (or, for a plain table, by the caller) and converted exactly once, here:
the working unit of the whole code is D_ℓ in μK². After `load`:

* ``value`` is in μK² (×1e12 from K²) and ``covariance`` in μK⁴ (×1e24 from K⁴);
* ``window`` always acts on D_ℓ in μK²: for C_ℓ data the weights are re-expressed exactly as
  W'_bℓ = W_bℓ · 2π / (ℓ(ℓ+1)), so ``window @ D_ℓ`` equals the C_ℓ-type band power in μK² — no
  approximation at ℓ_eff is made;
* ``to_dl`` turns ``value`` into a D_ℓ-type number at ℓ_eff for plots only: 1 for D_ℓ data and
  ℓ_eff(ℓ_eff+1)/2π for C_ℓ data.

Declared units (``units``): ``Dl_uK2``, ``Dl_K2``, ``Cl_uK2``, ``Cl_K2`` (spectrum type, then the unit
of the band powers).

HDF5 layout (``format = "infer-bandpowers"``, ``format_version = 1``); N bands, L window multipoles:

| name                    | type  | shape  | content                                                        |
|-------------------------|-------|--------|----------------------------------------------------------------|
| attr `format`           | str   | —      | `"infer-bandpowers"`                                           |
| attr `format_version`   | int   | —      | `1`                                                            |
| attr `experiment`       | str   | —      | free-text name of the experiment                               |
| attr `units`            | str   | —      | `Dl_uK2`, `Dl_K2`, `Cl_uK2` or `Cl_K2`                         |
| attr `description`      | str   | —      | free text (optional)                                           |
| `bands/kind`            | str   | (N,)   | `TT`, `TE`, `EE` or `BB`; the bands of one kind are contiguous |
| `bands/ell_lo`          | int   | (N,)   | first multipole of the band (inclusive, ≥ 2)                   |
| `bands/ell_hi`          | int   | (N,)   | last multipole of the band (inclusive)                         |
| `bands/ell_eff`         | float | (N,)   | effective multipole, inside [ell_lo, ell_hi]                   |
| `bands/value`           | float | (N,)   | band power in the declared units                               |
| `windows/ell`           | int   | (L,)   | contiguous ascending multipole grid of the weights             |
| `windows/weight`        | float | (N, L) | W_bℓ acting on the declared spectrum; each row sums to 1       |
| `covariance`            | float | (N, N) | covariance of `bands/value` (declared units squared)           |

Within a kind, bands are in increasing ℓ order and do not overlap. Bands are numbered from 0 in file
order in every message. Window weights may extend beyond [ell_lo, ell_hi] and may be negative, but
must vanish at ℓ < 2.

Plain-text route (``.txt``, ``.dat``, ``.csv``): a table separated by whitespace or commas whose header
line names the columns ``kind ell_lo ell_hi value`` and optionally ``ell_eff`` (default: the band
midpoint), in any order; ``#`` starts a comment (the header line itself may be written as a comment).
The covariance comes from a separate ``.npy`` file (read with ``allow_pickle=False``) or text table, and
the units from the caller. Windows are top-hats over ℓ_lo…ℓ_hi (weight 1/n) in the declared spectrum.

Every check runs before any theory call and fails with a one-line `infer.errors.UserError` that names
the file and the field. Files are data: read-only h5py, no pickles.
"""
from __future__ import annotations

import hashlib
import io
import math
import os
import re
import secrets
from dataclasses import dataclass
from pathlib import Path
import h5py
import numpy as np

from infer.errors import UserError
from infer.theory.base import KINDS

FORMAT = "infer-bandpowers"
FORMAT_VERSION = 1

#: Declared units → (spectrum is C_ℓ-type, factor turning the declared unit into μK²).
UNITS: dict[str, tuple[bool, float]] = {
    "Dl_uK2": (False, 1.0),
    "Dl_K2": (False, 1e12),
    "Cl_uK2": (True, 1.0),
    "Cl_K2": (True, 1e12),
}

HDF5_SUFFIXES = (".h5", ".hdf5")
PLAIN_SUFFIXES = (".txt", ".dat", ".csv")
COVARIANCE_TEXT_SUFFIXES = (".txt", ".dat", ".csv")

#: Tolerances of the checks.
WINDOW_SUM_TOL = 1e-3        # |Σ_ℓ W_bℓ − 1|
SYMMETRY_RTOL = 1e-8         # max|C − Cᵀ| / max|C|

PLAIN_REQUIRED = ("kind", "ell_lo", "ell_hi", "value")
PLAIN_OPTIONAL = ("ell_eff",)

# Names of the fields inside our HDF5 file (also used in messages).
_H5_FIELDS = {
    "kind": "bands/kind",
    "ell_lo": "bands/ell_lo",
    "ell_hi": "bands/ell_hi",
    "ell_eff": "bands/ell_eff",
    "value": "bands/value",
    "window_ell": "windows/ell",
    "window": "windows/weight",
    "covariance": "covariance",
}


@dataclass(frozen=True, eq=False, repr=False)
class BandPowers:
    """Band powers in the working units (see the module docstring); arrays are read-only."""

    source: str                 # path(s) it was read from, for messages
    experiment: str             # free-text name of the experiment
    kind: np.ndarray            # (N,) str; bands grouped by kind
    ell_lo: np.ndarray          # (N,) int, first multipole (inclusive)
    ell_hi: np.ndarray          # (N,) int, last multipole (inclusive)
    ell_eff: np.ndarray         # (N,) float
    value: np.ndarray           # (N,) float, μK² (D_ℓ-type or C_ℓ-type as declared)
    covariance: np.ndarray      # (N, N) μK⁴
    window_ell: np.ndarray      # (L,) int, contiguous ℓ grid of the windows
    window: np.ndarray          # (N, L): model band b = window[b] @ D_ℓ(window_ell), D_ℓ in μK²
    to_dl: np.ndarray           # (N,) factor turning value into D_ℓ μK² at ell_eff (plots only)
    units: str                  # units as declared: one of UNITS
    sha256: str                 # hex digest of the file bytes (plus the covariance file, plain route)

    def __len__(self) -> int:
        return int(self.kind.shape[0])

    def __repr__(self) -> str:
        return (f"BandPowers({self.experiment!r}, {len(self)} bands {'/'.join(self.spectra)}, "
                f"ℓ {int(self.ell_lo.min())}–{int(self.ell_hi.max())}, units {self.units}, "
                f"from {self.source})")

    @property
    def spectra(self) -> tuple[str, ...]:
        """Kinds present, in file order."""
        return tuple(dict.fromkeys(str(k) for k in self.kind))

    @property
    def ell_max_needed(self) -> int:
        """Largest ℓ with non-zero window weight in any band."""
        cols = np.flatnonzero((self.window != 0).any(axis=0))
        return int(self.window_ell[cols[-1]])

    def check_theory_ell_max(self, theory_ell_max: int) -> None:
        """Raise `UserError` if some band's window reaches beyond ``theory_ell_max``."""
        _check_reach(self.window, self.window_ell, self.kind, int(theory_ell_max),
                     f"{self.source}: windows")

    def cut(self, spectra=None, ell_min=None, ell_max=None) -> "BandPowers":
        """Keep the bands of ``spectra`` lying wholly inside [ell_min, ell_max], with their
        sub-covariance. The window grid is trimmed to the support of the kept bands."""
        keep = np.ones(len(self), dtype=bool)
        what = []
        if spectra is not None:
            if isinstance(spectra, str):
                spectra = (spectra,)
            spectra = tuple(spectra)
            unknown = [s for s in spectra if s not in KINDS]
            if unknown:
                raise UserError(f"{self.source}: unknown spectrum {unknown[0]!r} in the cut "
                                f"(known: {', '.join(KINDS)})")
            absent = [s for s in spectra if s not in self.spectra]
            if absent:
                raise UserError(f"{self.source}: the dataset has no {absent[0]} bands "
                                f"(it has {', '.join(self.spectra)})")
            keep &= np.isin(self.kind, spectra)
            what.append("spectra " + "/".join(spectra))
        if ell_min is not None:
            keep &= self.ell_lo >= int(ell_min)
            what.append(f"ℓ ≥ {int(ell_min)}")
        if ell_max is not None:
            keep &= self.ell_hi <= int(ell_max)
            what.append(f"ℓ ≤ {int(ell_max)}")
        if not keep.any():
            raise UserError(f"{self.source}: no band is left after the cut ({', '.join(what)})")
        idx = np.flatnonzero(keep)
        window = self.window[idx]
        cols = np.flatnonzero((window != 0).any(axis=0))
        span = slice(int(cols[0]), int(cols[-1]) + 1)
        return BandPowers(
            source=self.source, experiment=self.experiment,
            kind=_frozen(self.kind[idx]), ell_lo=_frozen(self.ell_lo[idx]),
            ell_hi=_frozen(self.ell_hi[idx]), ell_eff=_frozen(self.ell_eff[idx]),
            value=_frozen(self.value[idx]), covariance=_frozen(self.covariance[np.ix_(idx, idx)]),
            window_ell=_frozen(self.window_ell[span]), window=_frozen(window[:, span]),
            to_dl=_frozen(self.to_dl[idx]), units=self.units, sha256=self.sha256)


# ----------------------------------------------------------------------------------------- loading

def load(path, covariance=None, units=None, theory_ell_max=None) -> BandPowers:
    """Read a dataset, dispatching on the suffix: ``.h5``/``.hdf5`` our HDF5 format, ``.txt``/``.dat``/
    ``.csv`` a plain table (then ``covariance`` and ``units`` are required).

    With ``theory_ell_max`` every band's window support is checked against the theory's reach.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix in HDF5_SUFFIXES:
        if covariance is not None:
            raise UserError(f"{path}: a separate covariance file is only read for plain-text "
                            f"datasets; the HDF5 file holds its own 'covariance'")
        return _load_hdf5(path, units, theory_ell_max)
    if suffix in PLAIN_SUFFIXES:
        return _load_plain(path, covariance, units, theory_ell_max)
    raise UserError(f"{path}: unknown dataset suffix {path.suffix!r} (use .h5/.hdf5 for the "
                    f"infer band-power format or .txt/.dat/.csv for a plain table)")


def from_arrays(*, kind, ell_lo, ell_hi, value, covariance, ell_eff=None, window_ell=None,
                window=None, units="Dl_uK2", experiment="", source="<in memory>",
                theory_ell_max=None) -> BandPowers:
    """Build a checked `BandPowers` from arrays in the declared ``units`` (same checks and conversion
    as `load`). Without ``window`` the windows are top-hats over ℓ_lo…ℓ_hi; without ``ell_eff`` the
    band midpoints. ``sha256`` is then the digest of the declared-unit arrays."""
    raw = dict(kind=kind, ell_lo=ell_lo, ell_hi=ell_hi, ell_eff=ell_eff, value=value,
               covariance=covariance, window_ell=window_ell, window=window)
    if (window is None) != (window_ell is None):
        raise UserError(f"{source}: give both window_ell and window, or neither (top-hat windows)")
    labels = {k: f"{source}: {k}" for k in (*raw, "units")}
    return _assemble(raw, units=units, experiment=experiment, source=source, sha256=None,
                     labels=labels, theory_ell_max=theory_ell_max)


def _read_bytes(path: Path, what: str) -> bytes:
    try:
        return path.read_bytes()
    except FileNotFoundError:
        raise UserError(f"{path}: {what} not found") from None
    except IsADirectoryError:
        raise UserError(f"{path}: {what} is a directory, not a file") from None
    except PermissionError:
        raise UserError(f"{path}: {what} cannot be read (permission denied)") from None
    except OSError as exc:
        raise UserError(f"{path}: {what} cannot be read ({exc.strerror or exc})") from None


def _attr_str(value) -> str:
    if isinstance(value, (bytes, np.bytes_)):
        return value.decode("utf-8", errors="replace")
    if isinstance(value, np.ndarray) and value.shape == ():
        return _attr_str(value[()])
    return str(value)


def _load_hdf5(path: Path, units, theory_ell_max) -> BandPowers:
    data = _read_bytes(path, "dataset file")
    digest = hashlib.sha256(data).hexdigest()
    try:
        h5 = h5py.File(io.BytesIO(data), "r")
    except OSError:
        raise UserError(f"{path}: not a readable HDF5 file") from None
    with h5:
        attrs = h5.attrs
        if "format" not in attrs:
            raise UserError(f"{path}: attribute 'format' is missing; not an {FORMAT} file")
        fmt = _attr_str(attrs["format"])
        if fmt != FORMAT:
            raise UserError(f"{path}: attribute 'format' is {fmt!r}, expected {FORMAT!r}")
        if "format_version" not in attrs:
            raise UserError(f"{path}: attribute 'format_version' is missing")
        version = attrs["format_version"]
        try:
            version_int = int(version)
            ok = float(version) == version_int
        except (TypeError, ValueError):
            ok = False
        if not ok:
            raise UserError(f"{path}: attribute 'format_version' is {version!r}, expected an integer")
        if version_int > FORMAT_VERSION:
            raise UserError(f"{path}: attribute 'format_version' is {version_int}: written by a newer "
                            f"infer; this one reads version {FORMAT_VERSION}")
        if version_int < 1:
            raise UserError(f"{path}: attribute 'format_version' is {version_int}, expected "
                            f"{FORMAT_VERSION}")
        if "units" not in attrs:
            raise UserError(f"{path}: attribute 'units' is missing (one of {', '.join(UNITS)})")
        file_units = _attr_str(attrs["units"])
        if units is not None and units != file_units:
            raise UserError(f"{path}: attribute 'units' is {file_units!r} but {units!r} was asked for")
        experiment = _attr_str(attrs["experiment"]) if "experiment" in attrs else ""
        raw = {}
        for key, name in _H5_FIELDS.items():
            if name not in h5:
                raise UserError(f"{path}: {name}: missing field")
            obj = h5[name]
            if not isinstance(obj, h5py.Dataset):
                raise UserError(f"{path}: {name}: expected a dataset, found a group")
            raw[key] = obj[()]
    labels = {key: f"{path}: {name}" for key, name in _H5_FIELDS.items()}
    labels["units"] = f"{path}: attribute 'units'"
    return _assemble(raw, units=file_units, experiment=experiment, source=str(path),
                     sha256=digest, labels=labels, theory_ell_max=theory_ell_max)


_SPLIT = re.compile(r"[\s,]+")


def _tokens(line: str) -> list[str]:
    return [t for t in _SPLIT.split(line.strip()) if t]


def _load_plain(path: Path, covariance, units, theory_ell_max) -> BandPowers:
    if covariance is None:
        raise UserError(f"{path}: a plain-text dataset needs a covariance file (.npy or text)")
    if units is None:
        raise UserError(f"{path}: a plain-text dataset needs its units declared "
                        f"(one of {', '.join(UNITS)})")
    cov_path = Path(covariance)
    data = _read_bytes(path, "band-power table")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise UserError(f"{path}: band-power table is not UTF-8 text") from None

    header: list[str] | None = None
    rows: list[tuple[int, list[str]]] = []
    for lineno, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            toks = _tokens(stripped.lstrip("#"))
            if header is None and set(PLAIN_REQUIRED) <= set(toks):
                header = toks
            continue
        toks = _tokens(stripped.split("#", 1)[0])
        if header is None:
            header = toks
            continue
        rows.append((lineno, toks))
    if header is None:
        raise UserError(f"{path}: header line: missing; name the columns {' '.join(PLAIN_REQUIRED)}")
    allowed = PLAIN_REQUIRED + PLAIN_OPTIONAL
    for name in header:
        if name not in allowed:
            raise UserError(f"{path}: header line: unknown column {name!r} "
                            f"(allowed: {', '.join(allowed)})")
        if header.count(name) > 1:
            raise UserError(f"{path}: header line: column {name!r} appears twice")
    for name in PLAIN_REQUIRED:
        if name not in header:
            raise UserError(f"{path}: column {name}: missing from the header line")
    if not rows:
        raise UserError(f"{path}: no band rows below the header line")

    cols: dict[str, list] = {name: [] for name in header}
    for lineno, toks in rows:
        if len(toks) != len(header):
            raise UserError(f"{path}: line {lineno}: has {len(toks)} fields but the header names "
                            f"{len(header)}")
        for name, tok in zip(header, toks):
            if name == "kind":
                cols[name].append(tok)
                continue
            try:
                cols[name].append(float(tok))
            except ValueError:
                raise UserError(f"{path}: column {name}: line {lineno}: {tok!r} is not a number") \
                    from None

    cov_data = _read_bytes(cov_path, "covariance file")
    cov = _parse_covariance(cov_path, cov_data)
    hasher = hashlib.sha256(data)
    hasher.update(cov_data)

    raw = {"kind": np.array(cols["kind"]),
           "ell_lo": np.array(cols["ell_lo"]), "ell_hi": np.array(cols["ell_hi"]),
           "ell_eff": np.array(cols["ell_eff"]) if "ell_eff" in cols else None,
           "value": np.array(cols["value"]), "covariance": cov,
           "window_ell": None, "window": None}
    labels = {key: f"{path}: column {key}" for key in ("kind", "ell_lo", "ell_hi", "ell_eff", "value")}
    labels["covariance"] = f"{cov_path}: covariance"
    labels["window_ell"] = labels["window"] = f"{path}: windows (top-hat from ell_lo/ell_hi)"
    labels["units"] = f"{path}: units"
    return _assemble(raw, units=units, experiment="", source=f"{path} + {cov_path}",
                     sha256=hasher.hexdigest(), labels=labels, theory_ell_max=theory_ell_max)


def _parse_covariance(cov_path: Path, data: bytes) -> np.ndarray:
    suffix = cov_path.suffix.lower()
    if suffix == ".npy":
        try:
            arr = np.load(io.BytesIO(data), allow_pickle=False)
        except ValueError as exc:
            msg = str(exc).splitlines()[0] if str(exc) else "bad .npy data"
            if "pickle" in msg.lower():
                msg = "holds Python objects, which are never unpickled"
            raise UserError(f"{cov_path}: covariance: cannot be read as a numeric .npy array "
                            f"({msg})") from None
        except (OSError, EOFError):
            raise UserError(f"{cov_path}: covariance: not a readable .npy file") from None
        if not isinstance(arr, np.ndarray) or arr.dtype.kind not in "iuf":
            raise UserError(f"{cov_path}: covariance: expected a numeric array")
        return arr.astype(float)
    if suffix in COVARIANCE_TEXT_SUFFIXES:
        try:
            text = data.decode("utf-8")
            return np.loadtxt(io.StringIO(text.replace(",", " ")), comments="#", ndmin=2,
                              dtype=float)
        except (UnicodeDecodeError, ValueError) as exc:
            first = str(exc).splitlines()[0] if str(exc) else "unreadable"
            raise UserError(f"{cov_path}: covariance: not a numeric table ({first})") from None
    raise UserError(f"{cov_path}: covariance: unknown suffix {cov_path.suffix!r} "
                    f"(use .npy, .txt, .dat or .csv)")


# ---------------------------------------------------------------------------------- checks + units

def _frozen(arr: np.ndarray) -> np.ndarray:
    arr = np.array(arr, copy=True)
    arr.setflags(write=False)
    return arr


def _numeric(arr, label: str, ndim: int) -> np.ndarray:
    arr = np.asarray(arr)
    if arr.dtype.kind not in "iuf":
        raise UserError(f"{label}: must hold numbers (found {arr.dtype})")
    if arr.ndim != ndim:
        raise UserError(f"{label}: must be {ndim}-dimensional, found shape {arr.shape}")
    arr = arr.astype(float)
    bad = np.flatnonzero(~np.isfinite(arr.ravel()))
    if bad.size:
        where = np.unravel_index(bad[0], arr.shape)
        pos = f"band {where[0]}" if ndim == 1 else f"entry {tuple(int(i) for i in where)}"
        raise UserError(f"{label}: {pos} is {arr[where]} (NaN or infinite values are not allowed)")
    return arr


def _integers(arr, label: str) -> np.ndarray:
    arr = _numeric(arr, label, 1)
    frac = np.flatnonzero(arr != np.rint(arr))
    if frac.size:
        raise UserError(f"{label}: must hold integers (entry {frac[0]} is {arr[frac[0]]})")
    return np.rint(arr).astype(np.int64)


def _length(arr: np.ndarray, n: int, label: str) -> None:
    if arr.shape[0] != n:
        raise UserError(f"{label}: has {arr.shape[0]} entries but there are {n} bands")


def _decode_kinds(arr, label: str) -> np.ndarray:
    arr = np.asarray(arr)
    if arr.ndim != 1:
        raise UserError(f"{label}: must be 1-dimensional, found shape {arr.shape}")
    if arr.shape[0] == 0:
        raise UserError(f"{label}: no bands")
    out = []
    for i, item in enumerate(arr.tolist()):
        if isinstance(item, bytes):
            item = item.decode("utf-8", errors="replace")
        if not isinstance(item, str):
            raise UserError(f"{label}: band {i} is {item!r}, not a spectrum name")
        if item not in KINDS:
            raise UserError(f"{label}: band {i} has unknown kind {item!r} "
                            f"(known: {', '.join(KINDS)})")
        out.append(item)
    kinds = np.array(out, dtype="<U2")
    for k in dict.fromkeys(out):
        idx = np.flatnonzero(kinds == k)
        if idx[-1] - idx[0] + 1 != idx.size:
            gap = idx[np.flatnonzero(np.diff(idx) > 1)[0] + 1]
            raise UserError(f"{label}: bands of kind {k} are not grouped together "
                            f"(band {gap} is {k} again after other kinds)")
    return kinds


def _last_support(window: np.ndarray, window_ell: np.ndarray) -> np.ndarray:
    """Largest ℓ with non-zero weight, per band (-1 for an all-zero row)."""
    nz = window != 0
    last = window.shape[1] - 1 - np.argmax(nz[:, ::-1], axis=1)
    return np.where(nz.any(axis=1), window_ell[last], -1)


def _check_reach(window, window_ell, kind, theory_ell_max: int, label: str) -> None:
    reach = _last_support(np.asarray(window), np.asarray(window_ell))
    over = np.flatnonzero(reach > theory_ell_max)
    if over.size:
        b = int(over[0])
        raise UserError(f"{label}: band {b} ({kind[b]}) needs ℓ up to {int(reach[b])} but the theory "
                        f"is asked for ℓ ≤ {theory_ell_max}")


def _dl_factor(window_ell: np.ndarray) -> np.ndarray:
    """2π/(ℓ(ℓ+1)) on the grid (0 at ℓ < 2, where weights must vanish): C_ℓ = factor · D_ℓ."""
    ell = window_ell.astype(float)
    out = np.zeros_like(ell)
    ok = window_ell >= 2
    out[ok] = 2.0 * math.pi / (ell[ok] * (ell[ok] + 1.0))
    return out


def _assemble(raw: dict, *, units, experiment: str, source: str, sha256: str | None,
              labels: dict[str, str], theory_ell_max) -> BandPowers:
    """Check raw arrays in the declared units, convert them to the working units, freeze them."""
    if not isinstance(units, str) or units not in UNITS:
        raise UserError(f"{labels['units']}: unknown units {units!r} (known: {', '.join(UNITS)})")
    cl_type, scale = UNITS[units]

    kind = _decode_kinds(raw["kind"], labels["kind"])
    n = kind.shape[0]
    ell_lo = _integers(raw["ell_lo"], labels["ell_lo"])
    _length(ell_lo, n, labels["ell_lo"])
    ell_hi = _integers(raw["ell_hi"], labels["ell_hi"])
    _length(ell_hi, n, labels["ell_hi"])
    value = _numeric(raw["value"], labels["value"], 1)
    _length(value, n, labels["value"])
    if raw["ell_eff"] is None:
        ell_eff = 0.5 * (ell_lo + ell_hi)
    else:
        ell_eff = _numeric(raw["ell_eff"], labels["ell_eff"], 1)
        _length(ell_eff, n, labels["ell_eff"])
    cov = _numeric(raw["covariance"], labels["covariance"], 2)
    if cov.shape != (n, n):
        raise UserError(f"{labels['covariance']}: shape {cov.shape} does not match the {n} bands "
                        f"(expected ({n}, {n}))")

    # Band edges, one band at a time, then order and overlap within each kind.
    low = np.flatnonzero(ell_lo < 2)
    if low.size:
        b = int(low[0])
        raise UserError(f"{labels['ell_lo']}: band {b} ({kind[b]}) starts at ℓ = {ell_lo[b]}; "
                        f"band powers need ℓ ≥ 2")
    inverted = np.flatnonzero(ell_hi < ell_lo)
    if inverted.size:
        b = int(inverted[0])
        raise UserError(f"{labels['ell_hi']}: band {b} ({kind[b]}) ends at ℓ = {ell_hi[b]}, before "
                        f"its start ℓ = {ell_lo[b]}")
    outside = np.flatnonzero((ell_eff < ell_lo) | (ell_eff > ell_hi))
    if outside.size:
        b = int(outside[0])
        raise UserError(f"{labels['ell_eff']}: band {b} ({kind[b]}) has ell_eff {ell_eff[b]:g} outside "
                        f"its band ℓ {ell_lo[b]}–{ell_hi[b]}")
    for k in dict.fromkeys(kind.tolist()):
        idx = np.flatnonzero(kind == k)
        for a, b in zip(idx[:-1], idx[1:]):
            if ell_lo[b] <= ell_lo[a]:
                raise UserError(f"{labels['ell_lo']}: {k} bands are not in increasing ℓ order "
                                f"(band {b} starts at ℓ {ell_lo[b]}, band {a} at ℓ {ell_lo[a]})")
            if ell_lo[b] <= ell_hi[a]:
                raise UserError(f"{labels['ell_lo']}: band {b} ({k}, ℓ {ell_lo[b]}–{ell_hi[b]}) "
                                f"overlaps band {a} ({k}, ℓ {ell_lo[a]}–{ell_hi[a]})")

    # Windows: given, or top-hats over the band edges.
    if raw["window"] is None:
        window_ell = np.arange(int(ell_lo.min()), int(ell_hi.max()) + 1, dtype=np.int64)
        window = np.zeros((n, window_ell.size))
        for b in range(n):
            window[b, ell_lo[b] - window_ell[0]:ell_hi[b] - window_ell[0] + 1] = \
                1.0 / (ell_hi[b] - ell_lo[b] + 1)
    else:
        window_ell = _integers(raw["window_ell"], labels["window_ell"])
        if window_ell.size == 0:
            raise UserError(f"{labels['window_ell']}: empty multipole grid")
        if window_ell[0] < 0 or np.any(np.diff(window_ell) != 1):
            raise UserError(f"{labels['window_ell']}: must be a contiguous ascending grid of ℓ ≥ 0 "
                            f"(found {window_ell[0]}…{window_ell[-1]} with {window_ell.size} entries)")
        window = _numeric(raw["window"], labels["window"], 2)
        if window.shape != (n, window_ell.size):
            raise UserError(f"{labels['window']}: shape {window.shape} does not match {n} bands × "
                            f"{window_ell.size} multipoles of the window grid")
    early = np.flatnonzero((window[:, window_ell < 2] != 0).any(axis=1))
    if early.size:
        b = int(early[0])
        raise UserError(f"{labels['window']}: band {b} ({kind[b]}) has weight at ℓ < 2")
    sums = window.sum(axis=1)
    off = np.flatnonzero(np.abs(sums - 1.0) > WINDOW_SUM_TOL)
    if off.size:
        b = int(off[0])
        raise UserError(f"{labels['window']}: band {b} ({kind[b]}) weights sum to {sums[b]:.6g}; "
                        f"band-power windows must sum to 1 (tolerance {WINDOW_SUM_TOL:g})")

    # Covariance: symmetric, then positive definite (scale-free checks, before conversion).
    cmax = float(np.max(np.abs(cov)))
    asym = float(np.max(np.abs(cov - cov.T)))
    if asym > SYMMETRY_RTOL * cmax:
        raise UserError(f"{labels['covariance']}: not symmetric (largest |C_ij − C_ji| is "
                        f"{asym / cmax:.2g} of the largest entry; tolerance {SYMMETRY_RTOL:g})")
    cov = 0.5 * (cov + cov.T)
    try:
        np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        smallest = float(np.linalg.eigvalsh(cov)[0])
        raise UserError(f"{labels['covariance']}: not positive definite (smallest eigenvalue "
                        f"{smallest:.4g} {units.split('_')[1]}²)") from None

    if theory_ell_max is not None:
        _check_reach(window, window_ell, kind, int(theory_ell_max), labels["window"])

    if sha256 is None:
        hasher = hashlib.sha256()
        hasher.update(units.encode())
        hasher.update(",".join(kind.tolist()).encode())
        for arr in (ell_lo, ell_hi, ell_eff, value, cov, window_ell, window):
            hasher.update(np.ascontiguousarray(arr).tobytes())
        sha256 = hasher.hexdigest()

    # The one unit conversion of the code: to μK², windows acting on D_ℓ.
    if cl_type:
        window = window * _dl_factor(window_ell)[None, :]
        to_dl = ell_eff * (ell_eff + 1.0) / (2.0 * math.pi)
    else:
        to_dl = np.ones(n)
    return BandPowers(
        source=source, experiment=str(experiment), kind=_frozen(kind), ell_lo=_frozen(ell_lo),
        ell_hi=_frozen(ell_hi), ell_eff=_frozen(ell_eff), value=_frozen(value * scale),
        covariance=_frozen(cov * scale**2), window_ell=_frozen(window_ell), window=_frozen(window),
        to_dl=_frozen(to_dl), units=units, sha256=sha256)


# ----------------------------------------------------------------------------------------- writing

def write(bp: BandPowers, path, overwrite: bool = False, description: str = "") -> None:
    """Write ``bp`` in our HDF5 format, in its declared units (the inverse of `load`'s conversion).

    Refuses to replace an existing file unless ``overwrite``; writes a temporary file in the target's
    directory and moves it into place, so a crash never leaves a half-written dataset.
    """
    target = Path(path).expanduser()
    if target.suffix.lower() not in HDF5_SUFFIXES:
        raise UserError(f"{target}: a dataset is written as HDF5; use the suffix .h5 or .hdf5")
    if bp.units not in UNITS:
        raise UserError(f"{target}: cannot write units {bp.units!r} (known: {', '.join(UNITS)})")
    parent = target.parent.resolve()
    if not parent.is_dir():
        raise UserError(f"{target}: directory {parent} does not exist")
    target = parent / target.name
    if target.is_dir():
        raise UserError(f"{target}: is a directory")
    if target.exists() and not overwrite:
        raise UserError(f"{target}: refusing to overwrite an existing file")

    cl_type, scale = UNITS[bp.units]
    window = np.asarray(bp.window, dtype=float)
    if cl_type:
        factor = _dl_factor(np.asarray(bp.window_ell))
        inverse = np.divide(1.0, factor, out=np.zeros_like(factor), where=factor > 0)
        window = window * inverse[None, :]

    tmp = parent / f".{target.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp"
    try:
        with h5py.File(tmp, "w-") as h5:
            h5.attrs["format"] = FORMAT
            h5.attrs["format_version"] = np.int64(FORMAT_VERSION)
            h5.attrs["experiment"] = str(bp.experiment)
            h5.attrs["units"] = bp.units
            h5.attrs["description"] = str(description)
            bands = h5.create_group("bands")
            bands.create_dataset("kind", data=np.array([str(k) for k in bp.kind], dtype="S2"))
            bands.create_dataset("ell_lo", data=np.asarray(bp.ell_lo, dtype=np.int64))
            bands.create_dataset("ell_hi", data=np.asarray(bp.ell_hi, dtype=np.int64))
            bands.create_dataset("ell_eff", data=np.asarray(bp.ell_eff, dtype=float))
            bands.create_dataset("value", data=np.asarray(bp.value, dtype=float) / scale)
            windows = h5.create_group("windows")
            windows.create_dataset("ell", data=np.asarray(bp.window_ell, dtype=np.int64))
            windows.create_dataset("weight", data=window, compression="gzip", compression_opts=4,
                                   shuffle=True)
            h5.create_dataset("covariance", data=np.asarray(bp.covariance, dtype=float) / scale**2)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        if overwrite:
            os.replace(tmp, target)
        else:
            try:
                os.link(tmp, target)          # atomic and never clobbers
            except FileExistsError:
                raise UserError(f"{target}: refusing to overwrite an existing file") from None
            except OSError:                   # file system without hard links
                if target.exists():
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
    try:
        dir_fd = os.open(parent, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dir_fd)
    except OSError:
        pass
    finally:
        os.close(dir_fd)


__all__ = ["BandPowers", "load", "write", "from_arrays", "UNITS", "FORMAT", "FORMAT_VERSION"]
