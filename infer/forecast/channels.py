"""Invented multi-frequency experiments: the channels of a spec, its cross-spectra and beam eigenmodes.

A multi-frequency spec extends the single-channel `[experiment]` table (`infer.forecast.experiment`)
with one table per frequency channel::

    [channels.NAME]   nu_ghz (band centre, GHz), noise_uK_arcmin (temperature white noise),
                      beam_fwhm_arcmin (Gaussian beam), pol_noise_factor (optional, default √2),
                      bandpass (optional: two-column text file ν GHz, weight; relative to the spec),
                      beam_error (optional list: 1σ fractional error of B_ℓ at ell_max, one per mode),
                      calibration, pol_efficiency (truths of the mock, default 1),
                      beam_truth (truths of the beam amplitudes in units of their σ, default 0)

and an optional ``experiment.pairs`` list of ``"AxB"`` labels (A, B channel names). By default every auto
and cross pair is made: A ≤ B in channel order for TT and EE (the two orders are one spectrum), and both
orders for TE (T from A, E from B: Ĉ^{TE}_{AB} ≠ Ĉ^{TE}_{BA} for different channels).

Beam eigenmodes (our parametrisation; common practice is a few smooth modes per channel): mode k of a
channel of Gaussian width σ_b = θ_FWHM/√(8 ln 2) changes its beam window by the fraction
δB_ℓ/B_ℓ = a_k s_k φ_k(ℓ), with φ_k the Gram–Schmidt orthogonalisation over ell_min … ell_max of the
powers x, x², … of x = ℓ(ℓ+1)σ_b² (x is the first-order change of ln B_ℓ under a change of θ_FWHM),
scaled to φ_k(ell_max) = 1; s_k is the spec's ``beam_error`` and a_k ~ N(0, 1). A band of channels
(i, j) then changes by the fraction (δ_ci + δ_cj) s_k mean_b φ_k to first order — the dataset's
``beam_modes`` row of that mode. Channel names are user strings without "x" (the pair separator).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from infer import validate
from infer.errors import UserError

CHANNEL_KEYS = ("nu_ghz", "noise_uK_arcmin", "beam_fwhm_arcmin", "pol_noise_factor", "bandpass",
                "beam_error", "calibration", "pol_efficiency", "beam_truth")
#: Channel frequencies a CMB experiment may name (GHz): beyond 1 THz no CMB survey observes.
NU_RANGE = (1.0, 1000.0)
MAX_BEAM_MODES = 10


@dataclass(frozen=True)
class ChannelSpec:
    """One frequency channel of an invented experiment (see the module docstring)."""

    name: str
    nu_ghz: float
    noise_uK_arcmin: float
    beam_fwhm_arcmin: float
    pol_noise_factor: float
    bandpass_nu_ghz: np.ndarray | None
    bandpass_weight: np.ndarray | None
    beam_error: tuple[float, ...]
    calibration: float
    pol_efficiency: float
    beam_truth: tuple[float, ...]


def read_bandpass(path: Path, where: str, key: str) -> tuple[np.ndarray, np.ndarray]:
    """A bandpass file: two columns ν (GHz, strictly increasing, within `NU_RANGE`) and a weight (≥ 0)
    whose trapezoid integral is positive and finite. Read as numbers only (``numpy.loadtxt``)."""
    if not path.is_file():
        raise UserError(f"{where}: '{key}': bandpass file {path} does not exist")
    try:
        arr = np.loadtxt(path, dtype=float, comments="#", ndmin=2)
    except (ValueError, OSError) as exc:
        raise UserError(f"{where}: '{key}': {path} is not a two-column numeric table "
                        f"({' '.join(str(exc).split())[:80]})") from None
    if arr.shape[1] != 2 or arr.shape[0] < 2:
        raise UserError(f"{where}: '{key}': {path} must hold at least two rows of two columns "
                        f"(ν GHz, weight), got shape {arr.shape}")
    nu, w = arr[:, 0], arr[:, 1]
    if not (np.all(np.isfinite(nu)) and np.all(np.isfinite(w))):
        raise UserError(f"{where}: '{key}': {path} holds NaN or infinite values")
    if np.any(np.diff(nu) <= 0) or nu[0] < NU_RANGE[0] or nu[-1] > NU_RANGE[1]:
        raise UserError(f"{where}: '{key}': {path}: frequencies must increase strictly within "
                        f"{NU_RANGE[0]:g}–{NU_RANGE[1]:g} GHz")
    if np.any(w < 0):
        raise UserError(f"{where}: '{key}': {path}: negative bandpass weight at {nu[np.argmax(w < 0)]:g} GHz")
    total = float(np.sum(0.5 * (w[1:] + w[:-1]) * np.diff(nu)))
    if not (math.isfinite(total) and total > 0):
        raise UserError(f"{where}: '{key}': {path}: the bandpass does not integrate to a positive "
                        f"finite number (∫ w dν = {total:g})")
    return nu, w


def _numbers(where: str, key: str, value, n=None, low=None) -> tuple[float, ...]:
    if not isinstance(value, list) or (n is not None and len(value) != n):
        need = f"a list of {n} numbers" if n is not None else "a list of numbers"
        raise UserError(f"{where}: '{key}' must be {need}, got {validate.show(value)}")
    return tuple(float(validate.number(where, f"{key}[{i}]", v, low=low)) for i, v in enumerate(value))


def read_channels(where: str, tables: dict, base: Path, ell_max: int) -> tuple[ChannelSpec, ...]:
    """Check the ``[channels.NAME]`` tables of a spec (``base``: the spec's folder)."""
    if not isinstance(tables, dict) or not tables:
        raise UserError(f"{where}: [channels] must hold one table per channel, e.g. [channels.150]")
    out, n_modes = [], None
    for name, t in tables.items():
        if not name or "x" in name or any(ord(c) < 33 for c in name):
            raise UserError(f"{where}: channel name {name!r} must be non-empty, without 'x' (the pair "
                            f"separator) or spaces")
        sec = f"channels.{name}"
        validate.check_keys(where, sec, t, CHANNEL_KEYS)
        for key in ("nu_ghz", "noise_uK_arcmin", "beam_fwhm_arcmin"):
            if key not in t:
                raise UserError(f"{where}: missing key '{sec}.{key}'")
        nu = validate.number(where, f"{sec}.nu_ghz", t["nu_ghz"], low=NU_RANGE[0], high=NU_RANGE[1])
        noise = validate.number(where, f"{sec}.noise_uK_arcmin", t["noise_uK_arcmin"], low=0.0)
        fwhm = validate.number(where, f"{sec}.beam_fwhm_arcmin", t["beam_fwhm_arcmin"], low=0.0)
        pol = validate.number(where, f"{sec}.pol_noise_factor", t.get("pol_noise_factor", math.sqrt(2.0)),
                              low=0.0, low_open=True)
        cal = validate.number(where, f"{sec}.calibration", t.get("calibration", 1.0), low=0.0, low_open=True)
        eff = validate.number(where, f"{sec}.pol_efficiency", t.get("pol_efficiency", 1.0), low=0.0,
                              low_open=True)
        err = _numbers(where, f"{sec}.beam_error", t.get("beam_error", []), low=0.0)
        if len(err) > MAX_BEAM_MODES:
            raise UserError(f"{where}: '{sec}.beam_error' lists {len(err)} modes; at most {MAX_BEAM_MODES}")
        if n_modes is None:
            n_modes = len(err)
        elif len(err) != n_modes:
            raise UserError(f"{where}: '{sec}.beam_error' has {len(err)} modes, other channels {n_modes} "
                            f"(every channel has the same number of beam eigenmodes)")
        truth = _numbers(where, f"{sec}.beam_truth", t.get("beam_truth", [0.0] * len(err)), n=len(err))
        bp = (None, None)
        if "bandpass" in t:
            rel = Path(validate.text(where, f"{sec}.bandpass", t["bandpass"])).expanduser()
            bp = read_bandpass(rel if rel.is_absolute() else base / rel, where, f"{sec}.bandpass")
        with np.errstate(over="ignore"):
            from infer.forecast.knox import noise_dl
            if not np.isfinite(noise_dl(ell_max, 1.0, fwhm) ** 2):
                raise UserError(f"{where}: '{sec}.beam_fwhm_arcmin' = {fwhm}: the beam-deconvolved noise "
                                f"overflows before ℓ = {ell_max} (beam too wide for this ℓ range)")
        out.append(ChannelSpec(name, float(nu), float(noise), float(fwhm), float(pol), bp[0], bp[1],
                               err, float(cal), float(eff), truth))
    return tuple(out)


def cross_pairs(where: str, channels, spectra, pairs=None) -> list[tuple[str, str, str]]:
    """The (kind, channel_1, channel_2) spectra to make, grouped by kind in ``spectra`` order.

    Default (``pairs`` None): every auto and cross pair (see the module docstring). Given ``pairs``
    (labels "AxB"), TT and EE take each unordered pair once, TE takes the pairs as written."""
    names = [c.name for c in channels]
    if pairs is None:
        chosen = [(a, b) for i, a in enumerate(names) for b in names[i:]]
        te = [(a, b) for a in names for b in names]
    else:
        if not isinstance(pairs, list) or not pairs:
            raise UserError(f"{where}: 'experiment.pairs' must be a non-empty list of \"AxB\" labels")
        chosen = []
        for label in pairs:
            parts = label.split("x") if isinstance(label, str) else []
            if len(parts) != 2 or parts[0] not in names or parts[1] not in names:
                raise UserError(f"{where}: 'experiment.pairs': unknown frequency pair {validate.show(label)} "
                                f"(channels: {', '.join(names)}; write e.g. \"{names[0]}x{names[-1]}\")")
            if tuple(parts) in chosen:
                raise UserError(f"{where}: 'experiment.pairs' lists {label!r} twice")
            chosen.append(tuple(parts))
        te = list(chosen)
        order = {n: i for i, n in enumerate(names)}
        sym = []
        for a, b in chosen:
            key = (a, b) if order[a] <= order[b] else (b, a)
            if key not in sym:
                sym.append(key)
        chosen = sym
    return [(k, a, b) for k in spectra for a, b in (te if k == "TE" else chosen)]


def beam_mode_shapes(ell: np.ndarray, fwhm_arcmin: float, n_modes: int) -> np.ndarray:
    """(n_modes, L) shapes φ_k(ℓ) of the module docstring: orthogonal over ``ell``, φ_k(ℓ_max) = 1."""
    sigma = fwhm_arcmin * math.pi / (180 * 60) / math.sqrt(8 * math.log(2))
    x = ell * (ell + 1.0) * sigma**2
    x = x / x[-1] if x[-1] > 0 else np.linspace(0.0, 1.0, ell.size)   # a zero beam: shapes in ℓ²
    out = []
    for k in range(1, n_modes + 1):
        v = x**k
        for u in out:
            v = v - (v @ u) / (u @ u) * u
        out.append(v / v[-1])
    return np.array(out).reshape(n_modes, ell.size)


def field_index(channels, kind: str, a: str, b: str) -> tuple[int, int]:
    """Indices of the two fields of spectrum (kind, a, b) in `field_matrix` (T_i = 2i, E_i = 2i + 1)."""
    pos = {c.name: i for i, c in enumerate(channels)}
    x, y = kind
    return 2 * pos[a] + (x == "E"), 2 * pos[b] + (y == "E")


def field_matrix(channels, dl: dict, ell: np.ndarray, foreground: dict | None = None) -> np.ndarray:
    """(L, 2n, 2n) signal-plus-noise matrix M_ℓ of the fields T_i, E_i of n channels.

    Sky: the CMB D_ℓ (``dl`` TT/TE/EE at ℓ = 0…, μK²) plus ``foreground`` {(kind, a, b): (L,) D_ℓ} where
    given (a foreground absent for some field pair counts as zero), times the instrument truths —
    map T_i scaled by calibration c_i, map E_i by c_i p_i (so a spectrum scales as c_i c_j [p]), the
    gains of `infer.model` (foreground helper's note) — plus white noise N_i behind the channel's beam
    on the diagonal (`infer.forecast.knox.noise_dl`; E noise = pol_noise_factor² · T noise)."""
    from infer.forecast.knox import noise_dl
    n, ell = len(channels), np.asarray(ell)
    m = np.zeros((ell.size, 2 * n, 2 * n))
    gain = np.array([[c.calibration, c.calibration * c.pol_efficiency] for c in channels]).ravel()
    for i, ci in enumerate(channels):
        for j, cj in enumerate(channels):
            for kind in ("TT", "TE", "EE"):
                f1, f2 = field_index(channels, kind, ci.name, cj.name)
                sky = np.asarray(dl[kind], dtype=float)[ell]
                if foreground:
                    key = (kind, ci.name, cj.name)
                    alt = (kind, cj.name, ci.name) if kind != "TE" else None
                    if key in foreground:
                        sky = sky + foreground[key]
                    elif alt in foreground:
                        sky = sky + foreground[alt]
                m[:, f1, f2] = m[:, f2, f1] = sky * gain[f1] * gain[f2]
    for i, c in enumerate(channels):
        nt = noise_dl(ell, c.noise_uK_arcmin, c.beam_fwhm_arcmin)
        m[:, 2 * i, 2 * i] += nt
        m[:, 2 * i + 1, 2 * i + 1] += nt * c.pol_noise_factor**2
    return m


__all__ = ["field_index", "field_matrix", "ChannelSpec", "read_channels", "read_bandpass", "cross_pairs", "beam_mode_shapes",
           "CHANNEL_KEYS"]
