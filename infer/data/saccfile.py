"""SACC files (the open summary-statistics format, FITS form) read into, and written from, `BandPowers`.

The file is parsed by the `sacc` library itself (``sacc.Sacc.load_fits``, PyPI package ``sacc``); what
this module adds is the mapping onto our dataset and its checks (`infer.data.checks.assemble`). Files are
data: FITS tables through astropy, no pickles, no code. The bytes are read once, digested (SHA-256,
recorded in chains) and parsed from a private copy, so the digest is that of exactly what was checked.

Mapping (SACC → ours):

* data types: ``cl_00``/``cmb_temperature_cl`` → TT; ``cl_0e``/``cmb_temperaturePolarization_cl_e`` → TE
  (T map from the first tracer); ``cl_e0`` → TE with the tracers swapped; ``cl_ee``/``cmb_polarization_cl_ee``
  → EE; ``cl_bb``/``cmb_polarization_cl_bb`` → BB. TB and EB types, and every other type, are refused.
* tracers → channels: the channel name is the tracer's metadata ``channel`` if it has one, else the tracer
  name with a trailing ``_s0``/``_s2`` removed (a common naming of a channel's spin-0 and spin-2 maps; from
  memory), so
  a channel's T and E tracers merge into one channel (they must then agree on frequency and bandpass).
  The frequency (GHz) is the metadata ``nu_ghz``, else a ``NuMap`` tracer's single frequency, else the
  transmission-weighted mean ∫ν τ dν / ∫τ dν of its bandpass, which is kept as the channel's bandpass
  (weights taken as our response to a source of constant specific intensity, `infer.model.sed`). A file
  whose tracers all map to one channel without any frequency is a single-channel dataset (the unnamed
  channel). Tracers with a spin (``Map``, ``NuMap``) must have spin 0 in a T slot and spin 2 in E/B.
  Beams are not applied: band powers are taken as beam-deconvolved (a warning names a tracer whose beam
  is not 1).
* windows: each point's ``window`` tag must be a ``BandpowerWindow`` (its ``window_ind`` column), a
  tabulated ``Window`` or a ``TopHat`` [min, max) (SACC's exclusive upper end); all are placed on one
  contiguous integer ℓ grid. The weights act on the declared spectrum and must sum to 1 (our rule).
* ℓ_eff is the ``ell`` tag. Band edges: the tags ``ell_lo``/``ell_hi`` when every point has them; else, in
  each (kind, pair) block, the window supports when they do not overlap, else halfway between neighbouring
  ℓ_eff (outer edges: the window support).
* order: the bands are sorted into our canonical order — kinds TT, TE, EE, BB, then pairs in order of first
  appearance in the file, then ℓ_eff — and the covariance (full, block-diagonal or diagonal; made dense) is
  permuted with them, which leaves the likelihood unchanged.
* units: SACC does not record whether a value is C_ℓ or D_ℓ, nor its unit. They come from the ``units``
  argument (the run file's ``dataset.units``) or the file's metadata ``units`` (one of `UNITS`; our
  writer records it); both given must agree, neither is refused. A tracer ``map_unit`` of ``uK_CMB`` or
  ``K_CMB`` must agree with the unit part.
* optional per-point tags ``noise`` and ``fiducial`` (declared units) are read when every point has them.

`write` stores a `BandPowers` in this mapping (one spin-0 and one spin-2 ``NuMap`` tracer per channel, ``Map``
tracers ``cmb_s0``/``cmb_s2`` for the unnamed channel,
one ``BandpowerWindow``, a full covariance, metadata ``units``/``experiment``/``format``) so that `read` gives it
back; `replaceable` tells whether ``--replace`` may overwrite an existing file (one this writer made).
"""
from __future__ import annotations

import hashlib
import logging
import math
import numbers
import os
import tempfile
import warnings
from pathlib import Path

import numpy as np

from infer import validate
from infer.data.bandpowers import CHANNEL_NAME, UNITS, BandPowers, Channel, pair_label
from infer.data.checks import WINDOW_SUM_TOL, assemble, multipoles, read_bytes
from infer.errors import UserError
from infer.theory.base import KINDS

SUFFIXES = (".fits", ".fit", ".sacc")
#: The first bytes of every FITS file (FITS Standard 4.0, §4.4.1.1: the first card is SIMPLE = T).
FITS_SIGNATURE = b"SIMPLE  ="

#: SACC data type → (our kind, tracers swapped).
DATA_TYPES = {
    "cl_00": ("TT", False), "cmb_temperature_cl": ("TT", False),
    "cl_0e": ("TE", False), "cmb_temperaturePolarization_cl_e": ("TE", False), "cl_e0": ("TE", True),
    "cl_ee": ("EE", False), "cmb_polarization_cl_ee": ("EE", False),
    "cl_bb": ("BB", False), "cmb_polarization_cl_bb": ("BB", False),
}
#: CMB spectra SACC knows but infer does not model.
UNMODELLED = {"cl_0b": "TB", "cl_b0": "BT", "cl_eb": "EB", "cl_be": "BE", "cmb_polarization_cl_eb": "EB",
              "cmb_polarization_cl_be": "BE", "cmb_temperaturePolarization_cl_b": "TB"}
#: Spin required of each map of a kind.
SPINS = {"TT": (0, 0), "TE": (0, 2), "EE": (2, 2), "BB": (2, 2)}
#: Frequency units of a NuMap tracer → GHz.
NU_UNITS = {"GHz": 1.0, "MHz": 1e-3, "kHz": 1e-6, "Hz": 1e-9, "THz": 1e3}
#: Map units whose scale we can cross-check against the declared units.
MAP_UNITS = {"uK_CMB": "uK2", "K_CMB": "K2"}
SHOW_UNIT = {"uK2": "μK²", "K2": "K²"}

log = logging.getLogger("infer")


def is_sacc(path) -> bool:
    """Whether ``path`` names a SACC file: a SACC suffix, or any file starting with the FITS signature."""
    path = Path(path)
    if path.suffix.lower() in SUFFIXES:
        return True
    try:
        with open(path, "rb") as fh:
            return fh.read(len(FITS_SIGNATURE)) == FITS_SIGNATURE
    except OSError:
        return False


def _number(x) -> bool:
    """A real number, NumPy scalars included (not a boolean)."""
    return isinstance(x, numbers.Real) and not isinstance(x, (bool, np.bool_))


def _tag_array(path: Path, s, order, tag: str):
    """The numeric tag ``tag`` of every data point (in ``order``; NaN where masked), or None if one lacks it."""
    got = [s.data[i].get_tag(tag) for i in order]
    if any(v is None for v in got):
        return None
    got = [np.nan if v is np.ma.masked else v for v in got]     # FITS tables hand a stored NaN back masked
    bad = [i for i, v in zip(order, got) if not _number(v)]
    if bad:
        shown = _show(s.data[bad[0]].get_tag(tag))
        raise UserError(f"{path}: data point {bad[0]}: tag {tag!r} is {shown}, not a number")
    return np.array(got, float)


def _show(v) -> str:
    """repr of a value read from a file, NumPy scalars shown as plain Python values."""
    return repr(v.item() if isinstance(v, np.generic) else v)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else exc.__class__.__name__


def _parse(path: Path, data: bytes):
    """The `sacc.Sacc` of ``data`` (parsed from a private copy of exactly these bytes)."""
    if not data.startswith(FITS_SIGNATURE):
        raise UserError(f"{path}: not a FITS file: a .fits/.fit/.sacc suffix means a SACC file in FITS form, "
                        f"and this file does not start with the FITS signature 'SIMPLE  ='")
    import sacc
    fd, tmp = tempfile.mkstemp(suffix=".fits", prefix="infer-sacc-")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                s = sacc.Sacc.load_fits(tmp)
            except Exception as exc:   # a damaged or foreign file may fail anywhere inside astropy/sacc
                raise UserError(f"{path}: not a readable SACC file ({_first_line(exc)})") from None
    finally:
        os.unlink(tmp)
    if not s.data:
        said = "; ".join(" ".join(str(w.message).split()) for w in caught[:1])
        raise UserError(f"{path}: the SACC file holds no data points" + (f" (astropy: {said})" if said else ""))
    return s


def _units(path: Path, s, units) -> str:
    meta = s.metadata.get("units")
    if meta is not None and (not isinstance(meta, str) or meta not in UNITS):
        if units is None:
            raise UserError(f"{path}: metadata 'units' is {meta!r}, not one of {', '.join(UNITS)}; declare the "
                            f"units with dataset.units")
        meta = None                      # someone else's 'units' entry: the declared units decide
    if units is not None and meta is not None and units != meta:
        raise UserError(f"{path}: metadata 'units' is {meta!r} but {units!r} was asked for")
    chosen = units if units is not None else meta
    if chosen is None:
        raise UserError(f"{path}: a SACC file does not say whether its values are C_ℓ or D_ℓ, nor their unit; "
                        f"declare them with dataset.units (one of {', '.join(UNITS)})")
    if chosen not in UNITS:
        raise UserError(f"{path}: unknown units {chosen!r} (known: {', '.join(UNITS)})")
    return chosen


def _frequency(path: Path, tr):
    """(centre frequency in GHz or None, bandpass ν or None, bandpass weights or None) of a tracer."""
    where = f"{path}: tracer {str(tr.name)!r}"
    nu = bnu = bw = None
    if hasattr(tr, "nu") and hasattr(tr, "bandpass"):
        scale = NU_UNITS.get(str(getattr(tr, "nu_unit", "GHz")))
        if scale is None:
            raise UserError(f"{where}: nu_unit {tr.nu_unit!r} is not one of {', '.join(NU_UNITS)}")
        f = np.asarray(tr.nu, float).ravel() * scale
        w = np.asarray(tr.bandpass, float).ravel()
        if f.shape != w.shape or f.size == 0 or not np.all(np.isfinite(f)) or not np.all(np.isfinite(w)):
            raise UserError(f"{where}: bandpass needs finite frequencies with one weight each "
                            f"(found {f.size} and {w.size})")
        if f.size == 1:
            nu = float(f[0])
        else:
            bnu, bw = f, w
            trapezoid = getattr(np, "trapezoid", None) or np.trapz
            norm = float(trapezoid(w, f))
            if not (math.isfinite(norm) and norm > 0):
                raise UserError(f"{where}: bandpass does not integrate (∫ τ dν = {norm:g})")
            nu = float(trapezoid(w * f, f)) / norm
    meta = tr.metadata.get("nu_ghz")
    if meta is not None:
        if not _number(meta):
            raise UserError(f"{where}: metadata 'nu_ghz' is {meta!r}, not a number")
        nu = float(meta)
    return nu, bnu, bw


def _channel_name(path: Path, tr) -> str:
    name = tr.metadata.get("channel")
    if name is None:
        name = str(tr.name)
        spin = getattr(tr, "spin", None)
        for suffix in ("_s0", "_s2"):
            if name.endswith(suffix) and len(name) > 3 and spin in (None, int(suffix[-1])):
                name = name[:-3]
    name = str(name)
    if not CHANNEL_NAME.fullmatch(name):
        raise UserError(f"{path}: tracer {str(tr.name)!r} gives channel name {name!r}, which must be 1–32 letters, "
                        f"digits, '.', '_', '-', '+' without a lowercase 'x'; set the tracer's metadata 'channel'")
    return name


def _channels(path: Path, s, used: list[str], unit_part: str):
    """Tracer name → channel name, and the channels (file order), checked for consistency."""
    to_channel, info = {}, {}
    for tname in used:
        if tname not in s.tracers:
            raise UserError(f"{path}: tracer {tname!r} is named by a data point but not defined in the file")
        tr = s.tracers[tname]
        mu = getattr(tr, "map_unit", None)
        if mu in MAP_UNITS and MAP_UNITS[mu] != unit_part:
            raise UserError(f"{path}: tracer {tname!r} has map_unit {mu!r} but the declared units are in "
                            f"{SHOW_UNIT[unit_part]}")
        beam = np.asarray(getattr(tr, "beam", np.ones(1)), float)
        if beam.size and not np.allclose(beam, 1.0):
            log.warning(f"{path}: tracer {tname!r} carries a beam; infer takes the band powers as "
                        f"beam-deconvolved and does not apply it")
        cname = _channel_name(path, tr)
        freq = _frequency(path, tr)
        if cname in info:
            nu0, bnu0, bw0 = info[cname][1]
            same = (nu0 is None) == (freq[0] is None) and (nu0 is None or math.isclose(nu0, freq[0], rel_tol=1e-9))
            if freq[1] is not None and bnu0 is not None:
                same = same and bnu0.shape == freq[1].shape and np.allclose(bnu0, freq[1]) and np.allclose(bw0, freq[2])
            if not same:
                raise UserError(f"{path}: tracers {info[cname][0]!r} and {tname!r} are both channel {cname!r} "
                                f"but differ in frequency or bandpass")
            if bnu0 is None and freq[1] is not None:
                info[cname] = (info[cname][0], freq)
        else:
            info[cname] = (tname, freq)
        to_channel[tname] = cname
    if len(info) == 1 and next(iter(info.values()))[1][0] is None:
        return {t: "" for t in to_channel}, (Channel(""),)
    for cname, (tname, (nu, _, _)) in info.items():
        if nu is None:
            raise UserError(f"{path}: tracer {tname!r} (channel {cname!r}) has no frequency: give a NuMap "
                            f"tracer's bandpass or the metadata 'nu_ghz'")
    return to_channel, tuple(Channel(c, f[0], f[1], f[2]) for c, (_, f) in info.items())


def _window_column(path: Path, i: int, label: str, d, cache: dict):
    """(ℓ values as int64, weights) of data point ``i``'s window; a window shared by many points is checked
    once (``cache``) and its columns are views, so a large file costs only the window matrix."""
    import sacc
    w = d.get_tag("window")
    where = f"{path}: data point {i} ({label}): window"
    if w is None:
        raise UserError(f"{where}: missing (every band power needs a bandpower window)")
    if isinstance(w, sacc.windows.TopHatWindow) and not isinstance(w, sacc.windows.LogTopHatWindow):
        lo, hi = multipoles(np.array([w.min, w.max], float), where)
        if hi <= lo:
            raise UserError(f"{where}: top-hat [{lo}, {hi}) is empty")
        return np.arange(lo, hi), np.full(hi - lo, 1.0 / (hi - lo))
    if not isinstance(w, (sacc.windows.BandpowerWindow, sacc.windows.Window)):
        raise UserError(f"{where}: a {type(w).__name__} is not a bandpower window infer reads "
                        f"(BandpowerWindow, Window or TopHat)")
    if id(w) not in cache:
        ell = multipoles(np.asarray(w.values, float).ravel(), where + " ℓ values")
        weight = np.asarray(w.weight, float)
        if weight.shape[0] != ell.size or ell.size == 0:
            raise UserError(f"{where}: {ell.size} ℓ values but {weight.shape[0]} rows of weights")
        if np.unique(ell).size != ell.size or ell.min() < 0:
            raise UserError(f"{where}: ℓ values must be distinct and ≥ 0 (found {ell.min()}…{ell.max()}, "
                            f"{ell.size} values, {ell.size - np.unique(ell).size} repeated)")
        cache[id(w)] = (w, ell, weight)                # w kept so that its id is not reused
    _, ell, weight = cache[id(w)]
    if weight.ndim == 1:
        return ell, weight
    j = d.get_tag("window_ind")
    if not _number(j) or int(j) != j or not 0 <= int(j) < weight.shape[1]:
        raise UserError(f"{where}: window_ind {_show(j)} is not a column of its BandpowerWindow "
                        f"({weight.shape[1]} columns)")
    return ell, weight[:, int(j)]


def _edges(kind, pair, ell_eff, window, grid):
    """Band edges from the window supports, or halfway between neighbouring ℓ_eff (module docstring)."""
    nz = window != 0                                   # every row sums to 1, so has a non-zero weight
    first = grid[np.argmax(nz, axis=1)]
    last = grid[nz.shape[1] - 1 - np.argmax(nz[:, ::-1], axis=1)]
    lo, hi = first.copy(), last.copy()
    block = np.char.add(np.char.add(kind.astype(str), " "), pair.astype(str))
    for blk in dict.fromkeys(block.tolist()):
        idx = np.flatnonzero(block == blk)
        if np.all(last[idx[:-1]] < first[idx[1:]]):
            continue
        mid = np.floor(0.5 * (ell_eff[idx[:-1]] + ell_eff[idx[1:]])).astype(np.int64)
        hi[idx[:-1]] = mid
        lo[idx[1:]] = mid + 1
    return lo, hi


def read(path, units=None, theory_ell_max=None) -> BandPowers:
    """Read and check a SACC file (FITS) as band powers in our working units (see the module docstring)."""
    path = Path(path)
    data = read_bytes(path, "dataset file")
    digest = hashlib.sha256(data).hexdigest()
    s = _parse(path, data)
    units = _units(path, s, units)
    kinds, t1, t2, labels = [], [], [], []
    for i, d in enumerate(s.data):
        dt = str(d.data_type)
        if dt in UNMODELLED:
            raise UserError(f"{path}: data point {i}: data type {dt!r} ({UNMODELLED[dt]}) is not modelled by "
                            f"infer (it reads TT, TE, EE, BB); remove those points from the file")
        if dt not in DATA_TYPES:
            raise UserError(f"{path}: data point {i}: data type {dt!r} is not a CMB power spectrum infer reads "
                            f"(known: {', '.join(DATA_TYPES)})")
        if len(d.tracers) != 2:
            raise UserError(f"{path}: data point {i} ({dt}): needs 2 tracers, has {len(d.tracers)}")
        kind, swap = DATA_TYPES[dt]
        a, b = (str(d.tracers[1]), str(d.tracers[0])) if swap else (str(d.tracers[0]), str(d.tracers[1]))
        for tname, spin in zip((a, b), SPINS[kind]):
            have = getattr(s.tracers.get(tname), "spin", None)
            if have is not None and int(have) != spin:
                raise UserError(f"{path}: data point {i} ({dt}): tracer {tname!r} has spin {have}, but {kind} "
                                f"needs a spin-{spin} map there")
        kinds.append(kind)
        t1.append(a)
        t2.append(b)
        labels.append(f"{dt} {a}×{b}")
    unit_part = units.split("_")[1]
    named = set(t1 + t2)
    to_channel, chans = _channels(path, s, [str(t) for t in s.tracers if t in named] +
                                  [t for t in dict.fromkeys(t1 + t2) if t not in s.tracers], unit_part)
    c1 = np.array([to_channel[t] for t in t1], dtype="<U32")
    c2 = np.array([to_channel[t] for t in t2], dtype="<U32")
    kind = np.array(kinds, dtype="<U2")
    n = kind.size

    ell_eff = _tag_array(path, s, range(n), "ell")
    if ell_eff is None:
        i = next(i for i, d in enumerate(s.data) if d.get_tag("ell") is None)
        raise UserError(f"{path}: data point {i} ({labels[i]}): tag 'ell' (effective multipole) is missing")
    if not np.all(np.isfinite(ell_eff)):
        i = int(np.flatnonzero(~np.isfinite(ell_eff))[0])
        raise UserError(f"{path}: data point {i} ({labels[i]}): tag 'ell' (effective multipole) is {ell_eff[i]}")
    cache = {}
    columns = [_window_column(path, i, labels[i], d, cache) for i, d in enumerate(s.data)]
    grids = {id(ell): ell for ell, _ in columns}       # the distinct ℓ arrays
    grid = np.arange(min(int(e.min()) for e in grids.values()), max(int(e.max()) for e in grids.values()) + 1,
                     dtype=np.int64)
    if grid.size * n > 5e8:
        raise UserError(f"{path}: windows span ℓ {grid[0]}–{grid[-1]} for {n} bands: too large to hold")
    window = np.zeros((n, grid.size))
    offsets = {key: ell - grid[0] for key, ell in grids.items()}
    for i, (ell, weight) in enumerate(columns):
        total = float(weight.sum())
        if not np.any(weight != 0) or abs(total - 1.0) > WINDOW_SUM_TOL:     # named here in file order
            raise UserError(f"{path}: data point {i} ({labels[i]}): window weights sum to {total:.6g}; band-power "
                            f"windows must sum to 1 (tolerance {WINDOW_SUM_TOL:g})")
        window[i, offsets[id(ell)]] = weight

    if s.covariance is None:
        raise UserError(f"{path}: the SACC file has no covariance")
    try:
        cov = np.asarray(s.covariance.dense, float)
    except Exception as exc:
        raise UserError(f"{path}: covariance cannot be read ({_first_line(exc)})") from None
    if cov.shape != (n, n):
        raise UserError(f"{path}: covariance has shape {cov.shape} but the file holds {n} data points")

    # Canonical order: kind, then pair by first appearance in the file, then ℓ_eff (stable).
    pair = np.array([pair_label(a, b) for a, b in zip(c1.tolist(), c2.tolist())], dtype="<U65")
    pair_rank = {p: r for r, p in enumerate(dict.fromkeys(pair.tolist()))}
    order = np.array(sorted(range(n), key=lambda i: (KINDS.index(kind[i]), pair_rank[pair[i]], ell_eff[i])))
    kind, c1, c2, pair, ell_eff, window = kind[order], c1[order], c2[order], pair[order], ell_eff[order], window[order]
    value = np.array([float(s.data[i].value) if _number(s.data[i].value) else np.nan for i in order])
    cov = cov[np.ix_(order, order)]
    same = np.flatnonzero((kind[1:] == kind[:-1]) & (pair[1:] == pair[:-1]) & (ell_eff[1:] == ell_eff[:-1]))
    if same.size:
        i, j = sorted((int(order[same[0]]), int(order[same[0] + 1])))
        what = f"{kind[same[0]]} {pair[same[0]]}".strip()
        raise UserError(f"{path}: data points {i} and {j} are both {what} at ℓ_eff {ell_eff[same[0]]:g}: one band "
                        f"given twice")

    ell_lo, ell_hi = _tag_array(path, s, order, "ell_lo"), _tag_array(path, s, order, "ell_hi")
    edge = "tags 'ell_lo'/'ell_hi'"
    if ell_lo is None or ell_hi is None:
        ell_lo, ell_hi = _edges(kind, pair, ell_eff, window, grid)
        edge = "band edges from the windows"
    raw = {"kind": kind, "ell_lo": ell_lo, "ell_hi": ell_hi, "ell_eff": ell_eff, "value": value,
           "covariance": cov, "window_ell": grid, "window": window, "channel_1": c1, "channel_2": c2,
           "channels": chans, "noise": _tag_array(path, s, order, "noise"),
           "fiducial": _tag_array(path, s, order, "fiducial")}
    lab = {"kind": "data types", "ell_lo": edge, "ell_hi": edge, "ell_eff": "tag 'ell'", "value": "values",
           "covariance": "covariance", "window_ell": "windows", "window": "windows", "noise": "tag 'noise'",
           "fiducial": "tag 'fiducial'", "units": "units", "beam_modes": "beam modes"}
    labels = {k: f"{path}: {v} (bands numbered in canonical order)" for k, v in lab.items()}
    labels.update(dict.fromkeys(("channel_1", "channel_2", "channels"), f"{path}: tracers"))
    experiment = validate.text(f"{path}: metadata", "experiment", s.metadata.get("experiment", ""), empty=True,
                               line=True)
    return assemble(raw, units=units, experiment=experiment, source=str(path), sha256=digest,
                    labels=labels, theory_ell_max=theory_ell_max)


__all__ = ["read", "is_sacc", "SUFFIXES"]
