"""Our HDF5 band-power file: reader and writer (``format = "infer-bandpowers"``, version 2; reads 1 and 2).

HDF5 through h5py (the design card's file format); the file is read whole into memory and opened
read-only from there, so the SHA-256 recorded in a chain is the digest of exactly the bytes checked.
Files are data: no pickles, no code. N bands, L window multipoles:

| name                    | type  | shape  | content                                                        |
|-------------------------|-------|--------|----------------------------------------------------------------|
| attr `format`           | str   | —      | `"infer-bandpowers"`                                           |
| attr `format_version`   | int   | —      | `2` (version 1: the same file without the optional fields)     |
| attr `experiment`       | str   | —      | free-text name of the experiment                               |
| attr `units`            | str   | —      | `Dl_uK2`, `Dl_K2`, `Cl_uK2` or `Cl_K2`                         |
| attr `description`      | str   | —      | free text (optional)                                           |
| `bands/kind`            | str   | (N,)   | `TT`, `TE`, `EE` or `BB`; the bands of one kind are contiguous |
| `bands/ell_lo`          | int   | (N,)   | first multipole of the band (inclusive, ≥ 2)                   |
| `bands/ell_hi`          | int   | (N,)   | last multipole of the band (inclusive, ≤ 100000)               |
| `bands/ell_eff`         | float | (N,)   | effective multipole, inside [ell_lo, ell_hi]                   |
| `bands/value`           | float | (N,)   | band power in the declared units                               |
| `windows/ell`           | int   | (L,)   | contiguous ascending multipole grid of the weights             |
| `windows/weight`        | float | (N, L) | W_bℓ acting on the declared spectrum; each row sums to 1       |
| `covariance`            | float | (N, N) | covariance of `bands/value` (declared units squared)           |
| `bands/channel_1`, `bands/channel_2` | str | (N,) | optional: channels of the band's two maps (TE: T from 1, E from 2) |
| `channels/name`         | str   | (C,)   | optional (with the above): every channel named by a band       |
| `channels/nu_ghz`       | float | (C,)   | its centre frequency in GHz                                    |
| `channels/bandpass/NAME/nu_ghz`, `…/weight` | float | (M,) | optional bandpass of channel NAME (ascending ν, weights ≥ 0) |
| `nuisance/beam_modes`   | float | (K, N) | optional: fractional change of each band per unit beam-mode amplitude |
| `bands/noise`           | float | (N,)   | optional: noise band power (declared units; NaN: not given)    |
| `bands/fiducial`        | float | (N,)   | optional: fiducial band power (declared units; NaN: not given) |

A version-1 file (or a version-2 file without the optional fields) is one unnamed channel, no beam
modes, no noise or fiducial: exactly what version 1 meant.

Within a kind, bands are in increasing ℓ order and do not overlap. Window weights may extend beyond
[ell_lo, ell_hi] and may be negative, but must vanish at ℓ < 2. The checks and the unit conversion are
those of `infer.data.checks`. The writer stores the declared units (the inverse of the conversion) and
replaces files only through `infer.atomic.write_atomic` (fsync, then one rename).
"""
from __future__ import annotations

import hashlib
import io
from pathlib import Path

import h5py
import numpy as np

from infer import validate
from infer.atomic import write_atomic
from infer.data.bandpowers import UNITS, BandPowers, Channel
from infer.data.checks import assemble, dl_factor, read_bytes
from infer.errors import UserError

FORMAT = "infer-bandpowers"
FORMAT_VERSION = 2
SUFFIXES = (".h5", ".hdf5")

# Names of the fields inside the file (also used in messages).
FIELDS = {
    "kind": "bands/kind",
    "ell_lo": "bands/ell_lo",
    "ell_hi": "bands/ell_hi",
    "ell_eff": "bands/ell_eff",
    "value": "bands/value",
    "window_ell": "windows/ell",
    "window": "windows/weight",
    "covariance": "covariance",
}
#: Optional fields (version 2): key of `infer.data.checks.assemble` → name inside the file.
OPTIONAL_FIELDS = {
    "channel_1": "bands/channel_1",
    "channel_2": "bands/channel_2",
    "noise": "bands/noise",
    "fiducial": "bands/fiducial",
    "beam_modes": "nuisance/beam_modes",
}
CHANNEL_FIELDS = ("channels/name", "channels/nu_ghz")


def _attr_str(value) -> str:
    if isinstance(value, (bytes, np.bytes_)):
        return value.decode("utf-8", errors="replace")
    if isinstance(value, np.ndarray) and value.shape == ():
        return _attr_str(value[()])
    return str(value)


def _version(path: Path, value) -> int:
    """The ``format_version`` attribute as an int (numpy scalars and integral floats accepted)."""
    if isinstance(value, np.ndarray) and value.shape == ():
        value = value[()]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    where = f"{path}: attribute"
    version = validate.number(where, "format_version", value, integer=True, low=1)
    if version > FORMAT_VERSION:
        raise UserError(f"{path}: attribute 'format_version' is {version}: written by a newer "
                        f"infer; this one reads version {FORMAT_VERSION}")
    return version


def _dataset(h5, path: Path, name: str):
    """The array stored at ``name`` (a one-line `UserError` if it is missing, a group or unreadable)."""
    if name not in h5:
        raise UserError(f"{path}: {name}: missing field")
    obj = h5[name]
    if not isinstance(obj, h5py.Dataset):
        raise UserError(f"{path}: {name}: expected a dataset, found a group")
    try:
        return obj[()]
    except (OSError, ValueError, TypeError) as exc:
        first = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        raise UserError(f"{path}: {name}: cannot be read ({first})") from None


def _strings(values, path: Path, name: str) -> np.ndarray:
    """Stored strings (bytes or str) as a str array."""
    arr = np.asarray(values)
    if arr.ndim != 1 or arr.dtype.kind not in "SUO":
        raise UserError(f"{path}: {name}: expected a 1-D array of strings, got {arr.dtype} of shape {arr.shape}")
    return np.array([_attr_str(v) for v in arr], dtype=object).astype(str)


def _channels(h5, path: Path) -> list[Channel]:
    """The ``channels/`` group: names, centre frequencies, optional bandpasses (checked by `assemble`)."""
    names = _strings(_dataset(h5, path, "channels/name"), path, "channels/name")
    nu = np.asarray(_dataset(h5, path, "channels/nu_ghz"))
    if nu.shape != names.shape or nu.dtype.kind not in "fiu":
        raise UserError(f"{path}: channels/nu_ghz: expected {names.size} numbers (one per channels/name), "
                        f"got {nu.dtype} of shape {nu.shape}")
    out = []
    for name, value in zip(names, nu.astype(float)):
        group = f"channels/bandpass/{name}"
        bnu = bw = None
        if name and group in h5:
            bnu = _dataset(h5, path, f"{group}/nu_ghz")
            bw = _dataset(h5, path, f"{group}/weight")
        out.append(Channel(str(name), None if np.isnan(value) else float(value), bnu, bw))
    return out


def read(path: Path, units=None, theory_ell_max=None) -> BandPowers:
    """Read and check one of our HDF5 files; ``units``, when given, must match the file's."""
    path = Path(path)
    data = read_bytes(path, "dataset file")
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
        _version(path, attrs["format_version"])
        if "units" not in attrs:
            raise UserError(f"{path}: attribute 'units' is missing (one of {', '.join(UNITS)})")
        file_units = _attr_str(attrs["units"])
        if units is not None and units != file_units:
            raise UserError(f"{path}: attribute 'units' is {file_units!r} but {units!r} was asked for")
        experiment = ""
        if "experiment" in attrs:
            value = attrs["experiment"]
            if isinstance(value, np.ndarray) and value.shape == ():
                value = value[()]
            if not isinstance(value, (str, bytes, np.bytes_)):
                raise UserError(f"{path}: attribute 'experiment' must be a string, got "
                                f"{validate.show(value)}")
            experiment = validate.text(f"{path}: attribute", "experiment", _attr_str(value), empty=True,
                                       line=True)
        raw = {key: _dataset(h5, path, name) for key, name in FIELDS.items()}
        for key, name in OPTIONAL_FIELDS.items():
            raw[key] = _dataset(h5, path, name) if name in h5 else None
        for key in ("channel_1", "channel_2"):
            if raw[key] is not None:
                raw[key] = _strings(raw[key], path, OPTIONAL_FIELDS[key])
        raw["channels"] = _channels(h5, path) if "channels" in h5 else None
    labels = {key: f"{path}: {name}" for key, name in {**FIELDS, **OPTIONAL_FIELDS}.items()}
    labels["channels"] = f"{path}: channels"
    labels["units"] = f"{path}: attribute 'units'"
    return assemble(raw, units=file_units, experiment=experiment, source=str(path),
                    sha256=digest, labels=labels, theory_ell_max=theory_ell_max)


def check_target(path, overwrite: bool = False, suffixes=SUFFIXES,
                 kind: str = "a dataset is written as HDF5; use the suffix .h5 or .hdf5") -> Path:
    """Where `write` would write, checked without writing: suffix (one of ``suffixes``, else ``kind`` is
    the message), folder, not a folder itself, and (without ``overwrite``) not an existing file. Call it
    before any expensive step; the SACC writer uses it with its own suffixes."""
    target = Path(path).expanduser()
    if target.suffix.lower() not in suffixes:
        raise UserError(f"{target}: {kind}")
    try:
        parent = target.parent.resolve()
    except (OSError, RuntimeError) as exc:
        raise UserError(f"{target}: its folder cannot be resolved ({exc})") from None
    if not parent.is_dir():
        raise UserError(f"{target}: directory {parent} does not exist")
    target = parent / target.name
    if target.is_dir():
        raise UserError(f"{target}: is a directory")
    if not overwrite and target.exists():
        raise UserError(f"{target}: refusing to overwrite an existing file")
    return target


def write(bp: BandPowers, path, overwrite: bool = False, description: str = "") -> Path:
    """Write ``bp`` in our HDF5 format, in its declared units (the inverse of the reader's conversion).

    Refuses to replace an existing file unless ``overwrite``; a crash never leaves a half-written
    dataset (`infer.atomic.write_atomic`). Returns the path written.
    """
    target = check_target(path, overwrite)
    if bp.units not in UNITS:
        raise UserError(f"{target}: cannot write units {bp.units!r} (known: {', '.join(UNITS)})")
    cl_type, scale = UNITS[bp.units]
    window = np.asarray(bp.window, dtype=float)
    if cl_type:
        factor = dl_factor(np.asarray(bp.window_ell))
        inverse = np.divide(1.0, factor, out=np.zeros_like(factor), where=factor > 0)
        window = window * inverse[None, :]

    def fill(tmp: str) -> None:
        with h5py.File(tmp, "w") as h5:
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
            _write_optional(h5, bp, scale)

    return write_atomic(target, fill, overwrite=overwrite)


def _write_optional(h5, bp: BandPowers, scale: float) -> None:
    """The version-2 fields that differ from their single-channel defaults."""
    if any(c.name for c in bp.channels):
        bands = h5["bands"]
        for key in ("channel_1", "channel_2"):
            bands.create_dataset(key, data=np.array([str(c).encode() for c in getattr(bp, key)], dtype="S32"))
        group = h5.create_group("channels")
        group.create_dataset("name", data=np.array([c.name.encode() for c in bp.channels], dtype="S32"))
        group.create_dataset("nu_ghz", data=np.array([np.nan if c.nu_ghz is None else c.nu_ghz
                                                      for c in bp.channels], dtype=float))
        for c in bp.channels:
            if c.bandpass_nu_ghz is not None:
                group.create_dataset(f"bandpass/{c.name}/nu_ghz", data=np.asarray(c.bandpass_nu_ghz, float))
                group.create_dataset(f"bandpass/{c.name}/weight", data=np.asarray(c.bandpass_weight, float))
    for key in ("noise", "fiducial"):
        values = np.asarray(getattr(bp, key), float)
        if np.isfinite(values).any():
            h5["bands"].create_dataset(key, data=values / scale)
    if bp.beam_modes.shape[0]:
        h5.create_dataset("nuisance/beam_modes", data=np.asarray(bp.beam_modes, float))


__all__ = ["read", "write", "check_target", "FORMAT", "FORMAT_VERSION", "SUFFIXES", "FIELDS"]
