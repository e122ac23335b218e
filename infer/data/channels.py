"""The multi-frequency fields of a dataset, checked: channels (name, centre frequency, bandpass), the
channel pair of each band and its (kind, pair) blocks, beam modes, per-band noise and fiducial values.

Rules (each failure one line naming the source and the field): channel names are 1–32 letters, digits,
'.', '_', '-', '+' without a lowercase 'x' (the pair separator); a named channel has a frequency in
(0, 1e5] GHz; a bandpass has ≥ 2 strictly ascending frequencies > 0 and non-negative weights with a
positive, finite trapezoid integral; beam modes are (K, N) and finite; noise and fiducial are (N,), NaN
marking an absent value, never infinite, noise ≥ 0. Called by `infer.data.checks.assemble`.
"""
from __future__ import annotations

import math

import numpy as np

from infer.data.bandpowers import CHANNEL_NAME, Channel, frozen, pair_label
from infer.data.checks import _length, numeric
from infer.errors import UserError


def _names(arr, label: str, n: int) -> np.ndarray:
    """Channel names (bytes or str) of each band, one per band."""
    arr = np.asarray(arr)
    if arr.ndim != 1 or arr.shape[0] != n:
        raise UserError(f"{label}: must hold one channel name per band ({n}), found shape {arr.shape}")
    out = [x.decode("utf-8", errors="replace") if isinstance(x, bytes) else x for x in arr.tolist()]
    for i, x in enumerate(out):
        if not isinstance(x, str):
            raise UserError(f"{label}: band {i} is {x!r}, not a channel name")
    return np.array(out, dtype="<U32") if out else np.zeros(0, dtype="<U32")


def check_channel(ch: Channel, label: str) -> Channel:
    """A channel's name, frequency and bandpass checked; arrays frozen."""
    if ch.name != "" and not CHANNEL_NAME.fullmatch(ch.name):
        raise UserError(f"{label}: channel name {ch.name!r} must be 1–32 letters, digits, '.', '_', '-', "
                        f"'+' without a lowercase 'x' (the pair separator)")
    nu = ch.nu_ghz
    if nu is not None:
        nu = float(nu)
        if not math.isfinite(nu) or nu <= 0 or nu > 1e5:
            raise UserError(f"{label}: channel {ch.name!r} has frequency {nu:g} GHz (must be in (0, 1e5])")
    elif ch.name != "":
        raise UserError(f"{label}: channel {ch.name!r} has no frequency (only the unnamed channel "
                        f"of a single-channel file may omit it)")
    if (ch.bandpass_nu_ghz is None) != (ch.bandpass_weight is None):
        raise UserError(f"{label}: channel {ch.name!r}: give both bandpass frequencies and weights, or neither")
    bnu = bw = None
    if ch.bandpass_nu_ghz is not None:
        bnu = numeric(ch.bandpass_nu_ghz, f"{label}: channel {ch.name!r} bandpass frequencies", 1)
        bw = numeric(ch.bandpass_weight, f"{label}: channel {ch.name!r} bandpass weights", 1)
        if bnu.shape != bw.shape or bnu.size < 2:
            raise UserError(f"{label}: channel {ch.name!r}: bandpass needs ≥ 2 frequencies with one weight "
                            f"each (found {bnu.size} and {bw.size})")
        if bnu[0] <= 0 or np.any(np.diff(bnu) <= 0):
            raise UserError(f"{label}: channel {ch.name!r}: bandpass frequencies must be > 0 and strictly "
                            f"ascending")
        if np.any(bw < 0):
            raise UserError(f"{label}: channel {ch.name!r}: bandpass has negative weight "
                            f"{bw[np.argmax(bw < 0)]:g} at ν = {bnu[np.argmax(bw < 0)]:g} GHz")
        integral = float(np.trapz(bw, bnu)) if hasattr(np, "trapz") else float(np.trapezoid(bw, bnu))
        if not (math.isfinite(integral) and integral > 0):
            raise UserError(f"{label}: channel {ch.name!r}: bandpass does not integrate (∫ w dν = "
                            f"{integral:g}; it must be positive and finite)")
        bnu, bw = frozen(bnu), frozen(bw)
    return Channel(ch.name, nu, bnu, bw)


def band_channels(raw, kind, ell_lo, ell_hi, labels, n):
    """Per-band channel names, the channel table and the (kind, pair) block rules."""
    c1, c2 = raw.get("channel_1"), raw.get("channel_2")
    if c1 is None and c2 is None:
        c1 = c2 = np.full(n, "", dtype="<U32")
    elif c1 is None or c2 is None:
        raise UserError(f"{labels['channel_1']}: give both channel_1 and channel_2, or neither")
    c1 = _names(c1, labels["channel_1"], n)
    c2 = _names(c2, labels["channel_2"], n)
    given = raw.get("channels")
    if given is None:
        given = (Channel(""),)
    elif isinstance(given, dict):
        given = tuple(Channel(str(k), v) for k, v in given.items())
    chans = tuple(check_channel(c if isinstance(c, Channel) else Channel(*c), labels["channels"])
                  for c in given)
    known = [c.name for c in chans]
    dup = [x for x in known if known.count(x) > 1]
    if dup:
        raise UserError(f"{labels['channels']}: channel {dup[0]!r} is listed twice")
    for lab, names in ((labels["channel_1"], c1), (labels["channel_2"], c2)):
        for b, x in enumerate(names.tolist()):
            if x not in known:
                raise UserError(f"{lab}: band {b} names unknown channel {x!r} "
                                f"(known: {', '.join(repr(k) for k in known)})")
    if "" in set(c1.tolist()) | set(c2.tolist()) and len(known) > 1:
        raise UserError(f"{labels['channels']}: the unnamed channel '' is only allowed in a single-channel file")
    pair = np.array([pair_label(a, b) for a, b in zip(c1.tolist(), c2.tolist())])
    blocks = [f"{k} {p}" for k, p in zip(kind.tolist(), pair.tolist())]
    seen, prev = set(), None
    for b, blk in enumerate(blocks):
        if blk != prev:
            if blk in seen:
                raise UserError(f"{labels['channel_1']}: band {b} ({blk}) starts a second {blk} block; the "
                                f"bands of one (kind, pair) must be contiguous")
            seen.add(blk)
            prev = blk
    return c1, c2, chans


def optional_band_arrays(raw, labels, n):
    """beam_modes (K, N), noise and fiducial (N,; NaN = absent, ±∞ refused, noise ≥ 0)."""
    bm = raw.get("beam_modes")
    if bm is None:
        bm = np.zeros((0, n))
    else:
        bm = numeric(bm, labels["beam_modes"], 2)
        if bm.shape[1] != n:
            raise UserError(f"{labels['beam_modes']}: shape {bm.shape} does not match (K, {n} bands)")
    out = [bm]
    for key in ("noise", "fiducial"):
        arr = raw.get(key)
        if arr is None:
            out.append(np.full(n, np.nan))
            continue
        arr = np.asarray(arr)
        if arr.dtype.kind not in "iuf" or arr.ndim != 1:
            raise UserError(f"{labels[key]}: must be a 1-dimensional array of numbers (found {arr.dtype}, "
                            f"shape {arr.shape})")
        arr = arr.astype(float)
        _length(arr, n, labels[key])
        inf = np.flatnonzero(np.isinf(arr))
        if inf.size:
            raise UserError(f"{labels[key]}: band {inf[0]} is {arr[inf[0]]} (NaN marks an absent value; "
                            f"infinities are not allowed)")
        if key == "noise" and np.any(arr < 0):
            b = int(np.flatnonzero(arr < 0)[0])
            raise UserError(f"{labels[key]}: band {b} has negative noise {arr[b]:g}")
        out.append(arr)
    return out


__all__ = ["check_channel", "band_channels", "optional_band_arrays"]
