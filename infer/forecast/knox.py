"""White noise behind a Gaussian beam, and the Gaussian (Knox) band-power covariance.

The noise spectrum of a white-noise map of depth σ (μK·arcmin), deconvolved by a Gaussian beam of full
width at half maximum θ (Knox 1995, Phys. Rev. D 52, 4307), is

    N_ℓ = (σ θ_arcmin)² · exp(ℓ(ℓ+1) θ² / (8 ln 2)),   returned as D-type ℓ(ℓ+1) N_ℓ / 2π in μK²,

with σ in μK·rad and θ in radians (B_ℓ² = exp(−ℓ(ℓ+1)θ²/(8 ln 2))). Polarisation noise is
σ_P = pol_noise_factor · σ_T; the noise of TE is zero and BB has the EE noise.

Per multipole, the estimates of the spectra of Gaussian fields on a fraction f_sky of the sky have the
covariance (Knox 1995 for TT; the TT–TE–EE cross terms follow from the same Gaussian (Wick) argument,
e.g. Zaldarriaga, Spergel & Seljak 1997, ApJ 488, 1 — cited from memory)

    Cov(Ĉ^{XY}_ℓ, Ĉ^{WZ}_ℓ) = [M^{XW}_ℓ M^{YZ}_ℓ + M^{XZ}_ℓ M^{YW}_ℓ] / ((2ℓ+1) f_sky),
    M^{XY}_ℓ = C^{XY}_ℓ + N^{XY}_ℓ,

and estimates at different ℓ are independent. Since D_ℓ is C_ℓ times a factor common to all kinds at
fixed ℓ, the same formula holds with D_ℓ throughout, which is what is coded. Band b averages D̂_ℓ with
top-hat weights w_bℓ = 1/n over its n multipoles, so Cov(b, b') = Σ_ℓ w_bℓ w_b'ℓ Cov_ℓ.

Several frequency channels (`cross_covariance`): with fields F = (X, i) for kind X ∈ {T, E} and channel
i, every band power is a cross-spectrum Ĉ^{XY}_{ij} of the maps of channels i and j, and the same Gaussian
(Wick) argument gives, per ℓ (the multi-spectrum Gaussian covariance of Tegmark, Taylor & Heavens 1997,
ApJ 480, 22, and of cross-spectrum analyses generally — common practice, cited from memory),

    Cov(Ĉ^{XY}_{ij}, Ĉ^{ZW}_{kl}) = [M^{XZ}_{ik} M^{YW}_{jl} + M^{XW}_{il} M^{YZ}_{jk}] / ((2ℓ+1) f_sky),
    M^{XY}_{ij} = S^{XY}_{ij} + δ_ij N^{XY}_i,

with S the sky (CMB plus foregrounds, after the instrument) and N the noise of channel i (auto spectra
only: the noise of different channels is independent). One channel gives back the formula above.

Assumptions: isotropic white noise, a Gaussian beam known exactly, no T–B or E–B correlation (parity),
and the f_sky-scaled full-sky mode count (mode coupling of a cut sky is neglected).
"""
from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

from infer.errors import UserError
from infer.theory.base import Spectra

_ARCMIN = math.pi / (180.0 * 60.0)   # one arcminute in radians

# Which fields a spectrum kind correlates.
FIELDS = {"TT": ("T", "T"), "TE": ("T", "E"), "EE": ("E", "E"), "BB": ("B", "B")}


def noise_dl(ell, noise_uK_arcmin: float, beam_fwhm_arcmin: float) -> np.ndarray:
    """White noise deconvolved by a Gaussian beam, as D-type ℓ(ℓ+1)N_ℓ/2π in μK² (Knox 1995)."""
    ell = np.asarray(ell, dtype=float)
    if noise_uK_arcmin == 0:
        return np.zeros_like(ell)
    theta = np.float64(beam_fwhm_arcmin) * _ARCMIN          # numpy floats: overflow gives inf
    l2 = ell * (ell + 1.0)
    with np.errstate(over="ignore", invalid="ignore"):
        n_ell = (np.float64(noise_uK_arcmin) * _ARCMIN) ** 2 * np.exp(l2 * theta**2 / (8.0 * math.log(2.0)))
        return l2 * n_ell / (2.0 * math.pi)


class KnoxBands(NamedTuple):
    """Bands of a mock experiment, grouped by kind in ``exp.spectra`` order, with their covariance."""

    kind: np.ndarray          # (N,) str
    ell_lo: np.ndarray        # (N,) int
    ell_hi: np.ndarray        # (N,) int
    ell_eff: np.ndarray       # (N,) float, band midpoint (the mean ℓ of a top-hat)
    covariance: np.ndarray    # (N, N) μK⁴, D_ℓ-type band powers


def needed_kinds(spectra_kinds) -> tuple[str, ...]:
    """Theory spectra the covariance of these band-power kinds involves."""
    fields = {f for k in spectra_kinds for f in FIELDS[k]}
    need = [f + f for f in "TEB" if f in fields]
    if "T" in fields and "E" in fields:
        need.append("TE")
    return tuple(need)


def theory_dl(exp, spectra: Spectra, kinds) -> dict[str, np.ndarray]:
    """D_ℓ at ℓ = 0 … exp.ell_max for the kinds asked, checked."""
    if spectra.ell_max < exp.ell_max:
        raise UserError(f"experiment {exp.name!r}: needs theory spectra up to ℓ = {exp.ell_max}, "
                        f"got ℓ ≤ {spectra.ell_max}")
    out = {}
    for kind in kinds:
        if kind not in spectra.dl:
            raise UserError(f"experiment {exp.name!r}: theory spectra lack {kind}, which "
                            f"{'/'.join(exp.spectra)} band powers or their covariance need")
        dl = np.asarray(spectra.dl[kind], dtype=float)
        if dl.ndim != 1 or dl.size < exp.ell_max + 1:
            raise UserError(f"experiment {exp.name!r}: theory {kind} has {dl.size} multipoles, "
                            f"needs {exp.ell_max + 1}")
        dl = dl[: exp.ell_max + 1]
        if not np.all(np.isfinite(dl[exp.ell_min:])):
            raise UserError(f"experiment {exp.name!r}: theory {kind} has NaN or infinite values")
        out[kind] = dl
    return out


def knox_covariance(exp, spectra: Spectra) -> KnoxBands:
    """Band edges and the Gaussian band-power covariance (TT–TE–EE cross terms included) of an
    `infer.forecast.experiment.Experiment` whose fiducial spectra are ``spectra``."""
    dl = theory_dl(exp, spectra, needed_kinds(exp.spectra))
    lo, hi = exp.bin_edges()
    nb, width = exp.n_bins, exp.bin_width
    ell = np.arange(exp.ell_min, exp.ell_min + nb * width)
    nt = noise_dl(ell, exp.noise_uK_arcmin, exp.beam_fwhm_arcmin)
    noise = {"TT": nt, "EE": nt * exp.pol_noise_factor**2, "BB": nt * exp.pol_noise_factor**2}
    zero = np.zeros(ell.size)

    def m(a: str, b: str) -> np.ndarray:
        key = a + b if a + b in ("TT", "TE", "EE", "BB") else b + a
        if key not in ("TT", "TE", "EE", "BB"):
            return zero                           # TB, EB: zero by parity
        if key not in dl:
            return zero                           # never read when not needed
        return dl[key][ell] + noise.get(key, zero)

    modes = (2.0 * ell + 1.0) * exp.fsky
    kinds = exp.spectra
    n = len(kinds) * nb
    cov = np.zeros((n, n))
    for p, kp in enumerate(kinds):
        x, y = FIELDS[kp]
        for q, kq in enumerate(kinds[p:], start=p):
            w, z = FIELDS[kq]
            per_ell = (m(x, w) * m(y, z) + m(x, z) * m(y, w)) / modes
            block = per_ell.reshape(nb, width).sum(axis=1) / width**2
            idx_p = p * nb + np.arange(nb)
            idx_q = q * nb + np.arange(nb)
            cov[idx_p, idx_q] = block
            cov[idx_q, idx_p] = block
    kind = np.repeat(np.array(kinds, dtype="<U2"), nb)
    return KnoxBands(kind=kind, ell_lo=np.tile(lo, len(kinds)), ell_hi=np.tile(hi, len(kinds)),
                     ell_eff=np.tile(0.5 * (lo + hi), len(kinds)), covariance=cov)


def cross_covariance(m_ell: np.ndarray, first, second, ell: np.ndarray, fsky: float,
                     bin_width: int) -> np.ndarray:
    """Gaussian band-power covariance of cross-spectra between fields (several channels).

    ``m_ell`` is (L, F, F): the signal-plus-noise matrix M_ℓ of the F fields (symmetric per ℓ) at the
    contiguous multipoles ``ell`` (L = n_bins · bin_width); spectrum s correlates fields ``first[s]``
    and ``second[s]``. Bands are ordered spectrum-major (all bins of spectrum 0, then spectrum 1, …),
    top-hat bins of ``bin_width`` multipoles. Returns the (S·n_bins, S·n_bins) covariance (see the module
    docstring for the formula); different bins are independent."""
    m_ell = np.asarray(m_ell, dtype=float)
    a = np.asarray(first, dtype=np.int64)
    b = np.asarray(second, dtype=np.int64)
    ell = np.asarray(ell, dtype=float)
    n_ell = ell.size
    if m_ell.shape[0] != n_ell or n_ell % bin_width:
        raise ValueError("m_ell must have one matrix per multipole of whole bins")
    nb, ns = n_ell // bin_width, a.size
    modes = (2.0 * ell + 1.0) * fsky
    per_ell = (m_ell[:, a[:, None], a[None, :]] * m_ell[:, b[:, None], b[None, :]]
               + m_ell[:, a[:, None], b[None, :]] * m_ell[:, b[:, None], a[None, :]]) / modes[:, None, None]
    binned = per_ell.reshape(nb, bin_width, ns, ns).sum(axis=1) / bin_width**2     # (nb, S, S)
    cov = np.zeros((ns, nb, ns, nb))
    idx = np.arange(nb)
    cov[:, idx, :, idx] = binned
    return cov.reshape(ns * nb, ns * nb)


__all__ = ["noise_dl", "KnoxBands", "knox_covariance", "cross_covariance", "theory_dl", "needed_kinds", "FIELDS"]
