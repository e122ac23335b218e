"""Checks of a dataset's raw arrays, and the one unit conversion to D_ℓ in μK².

Every reader (`infer.data.hdf5`, `infer.data.text`, in-memory `from_arrays`) hands its raw arrays, in
the units the file declares, to `assemble`, which checks them in a fixed order and builds the frozen
`BandPowers`. Every failure is one `UserError` line that starts with the label of the field (file and
field name) and names the band (numbered from 0 in file order):

1. types and shapes: numbers where numbers belong, integers for multipoles, no NaN or ∞, one entry
   per band; multipoles within ±`MAX_ELL` (so that no absurd ℓ ever sizes an allocation);
2. bands: kinds known and grouped, ℓ_lo ≥ 2, ℓ_lo ≤ ℓ_hi, ℓ_eff inside the band, increasing and
   non-overlapping within a kind;
3. windows: contiguous ascending ℓ grid, no weight at ℓ < 2, each row sums to 1 within
   `WINDOW_SUM_TOL` (a band power is a weighted mean: Knox 1999, Phys. Rev. D 60, 103516);
4. covariance: N×N, symmetric within `SYMMETRY_RTOL`, positive definite (Cholesky, as the likelihood
   will use it).

Conversion (after the checks): values ×s, covariance ×s² with s from `UNITS`; C_ℓ windows become
windows on D_ℓ by W'_bℓ = W_bℓ · 2π/(ℓ(ℓ+1)) (exact, from D_ℓ = ℓ(ℓ+1)C_ℓ/2π).
"""
from __future__ import annotations

import hashlib
import math
import os
import stat
from pathlib import Path

import numpy as np

from infer.data.bandpowers import MAX_ELL, UNITS, BandPowers, check_reach, frozen
from infer.errors import UserError
from infer.theory.base import KINDS

#: Tolerances of the checks.
WINDOW_SUM_TOL = 1e-3        # |Σ_ℓ W_bℓ − 1|
SYMMETRY_RTOL = 1e-8         # max|C − Cᵀ| / max|C|


def read_bytes(path: Path, what: str) -> bytes:
    """The whole content of a user's regular file, or a one-line `UserError` saying why not."""
    try:
        info = os.stat(path)
        if stat.S_ISDIR(info.st_mode):
            raise IsADirectoryError
        if not stat.S_ISREG(info.st_mode):
            raise UserError(f"{path}: {what} is not a regular file (a device, pipe or socket)")
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise UserError(f"{path}: {what} not found") from None
    except IsADirectoryError:
        raise UserError(f"{path}: {what} is a directory, not a file") from None
    except PermissionError:
        raise UserError(f"{path}: {what} cannot be read (permission denied)") from None
    except OSError as exc:
        raise UserError(f"{path}: {what} cannot be read ({exc.strerror or exc})") from None


def numeric(arr, label: str, ndim: int) -> np.ndarray:
    """A finite float array of ``ndim`` dimensions."""
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


def multipoles(arr, label: str) -> np.ndarray:
    """Integral multipoles within ±MAX_ELL, as int64 (checked before any cast or allocation)."""
    arr = numeric(arr, label, 1)
    huge = np.flatnonzero(np.abs(arr) > MAX_ELL)
    if huge.size:
        raise UserError(f"{label}: entry {huge[0]} is ℓ = {arr[huge[0]]:g}, beyond the largest "
                        f"multipole infer reads ({MAX_ELL})")
    frac = np.flatnonzero(arr != np.rint(arr))
    if frac.size:
        raise UserError(f"{label}: must hold integers (entry {frac[0]} is {arr[frac[0]]})")
    return np.rint(arr).astype(np.int64)


def _length(arr: np.ndarray, n: int, label: str) -> None:
    if arr.shape[0] != n:
        raise UserError(f"{label}: has {arr.shape[0]} entries but there are {n} bands")


def decode_kinds(arr, label: str) -> np.ndarray:
    """Spectrum names (bytes or str) → '<U2' array; known kinds, each kind's bands contiguous."""
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


def dl_factor(window_ell: np.ndarray) -> np.ndarray:
    """2π/(ℓ(ℓ+1)) on the grid (0 at ℓ < 2, where weights must vanish): C_ℓ = factor · D_ℓ."""
    ell = window_ell.astype(float)
    out = np.zeros_like(ell)
    ok = window_ell >= 2
    out[ok] = 2.0 * math.pi / (ell[ok] * (ell[ok] + 1.0))
    return out


def _check_bands(kind, ell_lo, ell_hi, ell_eff, labels, c1=None, c2=None) -> None:
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
    block = kind if c1 is None else np.char.add(np.char.add(kind.astype("<U2"), "|"),
                                                    np.char.add(np.char.add(c1, "x"), c2))
    for k in dict.fromkeys(block.tolist()):
        idx = np.flatnonzero(block == k)
        k = str(kind[idx[0]])
        for a, b in zip(idx[:-1], idx[1:]):
            if ell_lo[b] <= ell_lo[a]:
                raise UserError(f"{labels['ell_lo']}: {k} bands are not in increasing ℓ order "
                                f"(band {b} starts at ℓ {ell_lo[b]}, band {a} at ℓ {ell_lo[a]})")
            if ell_lo[b] <= ell_hi[a]:
                raise UserError(f"{labels['ell_lo']}: band {b} ({k}, ℓ {ell_lo[b]}–{ell_hi[b]}) "
                                f"overlaps band {a} ({k}, ℓ {ell_lo[a]}–{ell_hi[a]})")


def _windows(raw, kind, ell_lo, ell_hi, labels) -> tuple[np.ndarray, np.ndarray]:
    """Given windows, checked; or top-hats over the band edges (ℓ already capped at MAX_ELL)."""
    n = kind.shape[0]
    if raw["window"] is None:
        window_ell = np.arange(int(ell_lo.min()), int(ell_hi.max()) + 1, dtype=np.int64)
        window = np.zeros((n, window_ell.size))
        for b in range(n):
            window[b, ell_lo[b] - window_ell[0]:ell_hi[b] - window_ell[0] + 1] = \
                1.0 / (ell_hi[b] - ell_lo[b] + 1)
    else:
        window_ell = multipoles(raw["window_ell"], labels["window_ell"])
        if window_ell.size == 0:
            raise UserError(f"{labels['window_ell']}: empty multipole grid")
        if window_ell[0] < 0 or np.any(np.diff(window_ell) != 1):
            raise UserError(f"{labels['window_ell']}: must be a contiguous ascending grid of ℓ ≥ 0 "
                            f"(found {window_ell[0]}…{window_ell[-1]} with {window_ell.size} entries)")
        window = numeric(raw["window"], labels["window"], 2)
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
    return window_ell, window


def _check_covariance(cov, units, label) -> np.ndarray:
    """Symmetric, then positive definite (scale-free checks, before conversion); symmetrised."""
    cmax = float(np.max(np.abs(cov)))
    asym = float(np.max(np.abs(cov - cov.T)))
    if asym > SYMMETRY_RTOL * cmax:
        raise UserError(f"{label}: not symmetric (largest |C_ij − C_ji| is "
                        f"{asym / cmax:.2g} of the largest entry; tolerance {SYMMETRY_RTOL:g})")
    cov = 0.5 * (cov + cov.T)
    try:
        np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        smallest = float(np.linalg.eigvalsh(cov)[0])
        unit = {"uK2": "μK⁴", "K2": "K⁴"}[units.split("_")[1]]
        raise UserError(f"{label}: not positive definite (smallest eigenvalue {smallest:.4g} {unit})") \
            from None
    return cov


def assemble(raw: dict, *, units, experiment: str, source: str, sha256: str | None,
             labels: dict[str, str], theory_ell_max) -> BandPowers:
    """Check raw arrays in the declared units, convert them to the working units, freeze them.

    ``raw`` holds kind, ell_lo, ell_hi, ell_eff (or None: band midpoints), value, covariance,
    window_ell and window (both None: top-hats); ``labels`` the message prefix of each, plus 'units'.
    ``sha256`` None: the digest of the declared-unit arrays."""
    if not isinstance(units, str) or units not in UNITS:
        raise UserError(f"{labels['units']}: unknown units {units!r} (known: {', '.join(UNITS)})")
    cl_type, scale = UNITS[units]

    kind = decode_kinds(raw["kind"], labels["kind"])
    n = kind.shape[0]
    ell_lo = multipoles(raw["ell_lo"], labels["ell_lo"])
    _length(ell_lo, n, labels["ell_lo"])
    ell_hi = multipoles(raw["ell_hi"], labels["ell_hi"])
    _length(ell_hi, n, labels["ell_hi"])
    value = numeric(raw["value"], labels["value"], 1)
    _length(value, n, labels["value"])
    if raw["ell_eff"] is None:
        ell_eff = 0.5 * (ell_lo + ell_hi)
    else:
        ell_eff = numeric(raw["ell_eff"], labels["ell_eff"], 1)
        _length(ell_eff, n, labels["ell_eff"])
    cov = numeric(raw["covariance"], labels["covariance"], 2)
    if cov.shape != (n, n):
        raise UserError(f"{labels['covariance']}: shape {cov.shape} does not match the {n} bands "
                        f"(expected ({n}, {n}))")
    for key in ("channel_1", "channel_2", "channels", "beam_modes", "noise", "fiducial"):
        labels.setdefault(key, f"{source}: {key}")
    from infer.data.channels import band_channels, optional_band_arrays   # the multi-frequency fields
    c1, c2, chans = band_channels(raw, kind, ell_lo, ell_hi, labels, n)
    _check_bands(kind, ell_lo, ell_hi, ell_eff, labels, c1, c2)
    beam_modes, noise, fiducial = optional_band_arrays(raw, labels, n)
    window_ell, window = _windows(raw, kind, ell_lo, ell_hi, labels)
    cov = _check_covariance(cov, units, labels["covariance"])
    if theory_ell_max is not None:
        check_reach(window, window_ell, kind, int(theory_ell_max), labels["window"])

    if sha256 is None:
        hasher = hashlib.sha256()
        hasher.update(units.encode())
        hasher.update(",".join(kind.tolist()).encode())
        for arr in (ell_lo, ell_hi, ell_eff, value, cov, window_ell, window):
            hasher.update(np.ascontiguousarray(arr).tobytes())
        if any(c.name for c in chans) or beam_modes.shape[0] or np.isfinite(noise).any() or np.isfinite(fiducial).any():
            hasher.update(repr([(c.name, c.nu_ghz) for c in chans]).encode())   # multi-frequency fields
            hasher.update(",".join(f"{a}|{b}" for a, b in zip(c1, c2)).encode())
            for c in chans:
                if c.bandpass_nu_ghz is not None:
                    hasher.update(np.ascontiguousarray(c.bandpass_nu_ghz).tobytes())
                    hasher.update(np.ascontiguousarray(c.bandpass_weight).tobytes())
            for arr in (beam_modes, noise, fiducial):
                hasher.update(np.ascontiguousarray(arr).tobytes())
        sha256 = hasher.hexdigest()

    # The one unit conversion of the code: to μK², windows acting on D_ℓ.
    if cl_type:
        window = window * dl_factor(window_ell)[None, :]
        to_dl = ell_eff * (ell_eff + 1.0) / (2.0 * math.pi)
    else:
        to_dl = np.ones(n)
    return BandPowers(
        source=source, experiment=str(experiment), kind=frozen(kind), ell_lo=frozen(ell_lo),
        ell_hi=frozen(ell_hi), ell_eff=frozen(ell_eff), value=frozen(value * scale),
        covariance=frozen(cov * scale**2), window_ell=frozen(window_ell), window=frozen(window),
        to_dl=frozen(to_dl), units=units, sha256=sha256, channel_1=frozen(c1), channel_2=frozen(c2),
        channels=chans, beam_modes=frozen(beam_modes), noise=frozen(noise * scale),
        fiducial=frozen(fiducial * scale))


def from_arrays(*, kind, ell_lo, ell_hi, value, covariance, ell_eff=None, window_ell=None,
                window=None, units="Dl_uK2", experiment="", source="<in memory>",
                theory_ell_max=None, channel_1=None, channel_2=None, channels=None, beam_modes=None,
                noise=None, fiducial=None) -> BandPowers:
    """Build a checked `BandPowers` from arrays in the declared ``units`` (same checks and conversion
    as a file). Without ``window`` the windows are top-hats over ℓ_lo…ℓ_hi; without ``ell_eff`` the
    band midpoints. ``sha256`` is then the digest of the declared-unit arrays."""
    raw = dict(kind=kind, ell_lo=ell_lo, ell_hi=ell_hi, ell_eff=ell_eff, value=value,
               covariance=covariance, window_ell=window_ell, window=window, channel_1=channel_1,
               channel_2=channel_2, channels=channels, beam_modes=beam_modes, noise=noise, fiducial=fiducial)
    if (window is None) != (window_ell is None):
        raise UserError(f"{source}: give both window_ell and window, or neither (top-hat windows)")
    labels = {k: f"{source}: {k}" for k in (*raw, "units")}
    return assemble(raw, units=units, experiment=experiment, source=source, sha256=None,
                    labels=labels, theory_ell_max=theory_ell_max)


__all__ = ["assemble", "from_arrays", "read_bytes", "numeric", "multipoles", "decode_kinds",
           "dl_factor", "WINDOW_SUM_TOL", "SYMMETRY_RTOL"]
