"""Tests of the multi-frequency Gaussian (Knox) covariance in infer.forecast.knox.cross_covariance.

References beside each check: Knox 1995 (Phys. Rev. D 52, 4307) through the single-channel function it
must reduce to; Isserlis' (Wick's) theorem checked by a Monte Carlo of Gaussian harmonic coefficients
drawn with numpy (the sample covariance of measured cross-spectra, compared within its MC error).
"""
from __future__ import annotations

import numpy as np
import pytest

from infer import forecast as mock
from infer.errors import UserError
from infer.forecast import channels as ch
from infer.forecast.knox import cross_covariance, noise_dl

from test_mock import toy_spectra


def test_one_channel_reduces_to_single_channel_knox():
    # Reference: the single-channel Knox covariance (Knox 1995, with the TT–TE–EE Wick cross terms),
    # itself checked against scipy.stats.wishart in tests/test_mock.py.
    exp = mock.Experiment(name="Toy", fsky=0.4, noise_uK_arcmin=30.0, beam_fwhm_arcmin=10.0,
                          ell_min=30, ell_max=329, bin_width=20, spectra=("TT", "TE", "EE"))
    spectra = toy_spectra()
    ref = mock.knox_covariance(exp, spectra).covariance
    ell = np.arange(exp.ell_min, exp.ell_min + exp.n_bins * exp.bin_width)
    nt = noise_dl(ell, exp.noise_uK_arcmin, exp.beam_fwhm_arcmin)
    m = np.empty((ell.size, 2, 2))
    m[:, 0, 0] = spectra.dl["TT"][ell] + nt
    m[:, 1, 1] = spectra.dl["EE"][ell] + nt * exp.pol_noise_factor**2
    m[:, 0, 1] = m[:, 1, 0] = spectra.dl["TE"][ell]
    got = cross_covariance(m, [0, 0, 1], [0, 1, 1], ell, exp.fsky, exp.bin_width)
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=0)


def _random_m(rng, n_fields: int) -> np.ndarray:
    """A random positive-definite field covariance with strong correlations (a made-up sky)."""
    a = rng.normal(size=(n_fields, n_fields)) + 1.5 * np.eye(n_fields)
    return a @ a.T


def test_cross_covariance_matches_monte_carlo_of_harmonic_coefficients():
    # Reference: Isserlis' theorem (Isserlis 1918, Biometrika 12, 134 — from memory), checked here by a
    # Monte Carlo: at each ℓ, 2ℓ+1 real Gaussian coefficient vectors a_ℓm of 3 correlated fields (say
    # T at two channels and E at one) with covariance M_ℓ; Ĉ_ij = Σ_m a_i a_j / (2ℓ+1). The sample
    # covariance of every auto and cross spectrum must match cross_covariance within its MC error
    # (standard error of a sample covariance ≈ √((Σ_aa Σ_bb + Σ_ab²)/n), e.g. Anderson 2003 — from memory).
    rng = np.random.default_rng(2026)
    ells = np.array([8, 9, 10, 11])                     # two bins of two multipoles
    n_fields, n_sim = 3, 40000
    pairs = [(i, j) for i in range(n_fields) for j in range(i, n_fields)]
    first, second = [p[0] for p in pairs], [p[1] for p in pairs]
    m = np.array([_random_m(rng, n_fields) for _ in ells])
    sims = np.zeros((n_sim, len(pairs), 2))
    for k, ell in enumerate(ells):
        chol = np.linalg.cholesky(m[k])
        a = rng.standard_normal((n_sim, 2 * ell + 1, n_fields)) @ chol.T
        c = np.einsum("smi,smj->sij", a, a) / (2 * ell + 1)
        sims[:, :, k // 2] += c[:, first, second] / 2
    sims = sims.reshape(n_sim, -1)                     # spectrum-major, like cross_covariance
    expect = cross_covariance(m, first, second, ells, 1.0, 2)
    sample = np.cov(sims, rowvar=False)
    sd2 = np.diag(expect)
    se = np.sqrt((np.outer(sd2, sd2) + expect**2) / n_sim)
    z = (sample - expect) / se
    assert np.max(np.abs(z)) < 5.0, np.max(np.abs(z))
    # The mean of each measured spectrum is the binned M (unbiased estimator, same theorem).
    mean_expect = np.stack([m[:, i, j].reshape(2, 2).mean(axis=1) for i, j in pairs]).ravel()
    assert np.max(np.abs(sims.mean(axis=0) - mean_expect) / np.sqrt(sd2 / n_sim)) < 5.0
    # Different bins are independent (no multipole is shared).
    nb = 2
    assert np.all(expect.reshape(len(pairs), nb, len(pairs), nb)[:, 0, :, 1] == 0.0)


# -- the channel tables of a multi-frequency spec (infer.forecast.channels) ----------------------------
CH = {"95": {"nu_ghz": 95.0, "noise_uK_arcmin": 30.0, "beam_fwhm_arcmin": 2.0, "beam_error": [0.01]},
      "150": {"nu_ghz": 150.0, "noise_uK_arcmin": 25.0, "beam_fwhm_arcmin": 1.4, "beam_error": [0.01]},
      "220": {"nu_ghz": 220.0, "noise_uK_arcmin": 70.0, "beam_fwhm_arcmin": 1.0, "beam_error": [0.02]}}


def test_default_pairs_are_every_auto_and_cross_spectrum(tmp_path):
    # Common practice: n(n+1)/2 distinct TT and EE spectra, n² TE (T and E from different maps).
    chans = ch.read_channels("spec.toml", CH, tmp_path, 2000)
    got = ch.cross_pairs("spec.toml", chans, ("TT", "TE", "EE"))
    assert [sum(k == kind for k, _, _ in got) for kind in ("TT", "TE", "EE")] == [6, 9, 6]
    assert ("TE", "220", "95") in got and ("TT", "220", "95") not in got


def test_bad_channel_input_is_one_line(tmp_path):
    chans = ch.read_channels("spec.toml", CH, tmp_path, 2000)
    with pytest.raises(UserError, match=r"unknown frequency pair '95x145'"):
        ch.cross_pairs("spec.toml", chans, ("TT",), ["95x145"])
    flat = tmp_path / "zero.txt"
    flat.write_text("# ν GHz, weight\n140 0\n150 0\n160 0\n")
    bad = {**CH, "150": {**CH["150"], "bandpass": "zero.txt"}}
    with pytest.raises(UserError, match=r"channels.150.bandpass.*does not integrate"):
        ch.read_channels("spec.toml", bad, tmp_path, 2000)


def test_beam_mode_shapes_are_orthogonal_and_first_is_the_fwhm_error():
    # First-order change of ln B_ℓ = −ℓ(ℓ+1)σ_b²/2 (Gaussian beam, common knowledge) under a fractional
    # FWHM change ε is −ℓ(ℓ+1)σ_b² ε: mode 1 is proportional to ℓ(ℓ+1).
    ell = np.arange(50, 2000, dtype=float)
    phi = ch.beam_mode_shapes(ell, 1.4, 3)
    np.testing.assert_allclose(phi[0], ell * (ell + 1) / (ell[-1] * (ell[-1] + 1)), rtol=1e-12)
    gram = phi @ phi.T
    assert np.max(np.abs(gram - np.diag(np.diag(gram)))) < 1e-8 * np.max(np.diag(gram))
    np.testing.assert_allclose(phi[:, -1], 1.0)


def test_field_matrix_of_one_channel_gives_the_single_channel_knox_covariance(tmp_path):
    # Reference: Knox 1995 single-channel covariance (infer.forecast.knox_covariance, tested against
    # scipy.stats.wishart in tests/test_mock.py); here through the channel route end to end.
    exp = mock.Experiment(name="Toy", fsky=0.3, noise_uK_arcmin=25.0, beam_fwhm_arcmin=7.0,
                          ell_min=30, ell_max=329, bin_width=30, spectra=("TT", "TE", "EE"))
    one = {"150": {"nu_ghz": 150.0, "noise_uK_arcmin": 25.0, "beam_fwhm_arcmin": 7.0}}
    chans = ch.read_channels("spec.toml", one, tmp_path, exp.ell_max)
    ell = np.arange(exp.ell_min, exp.ell_max + 1)
    spectra = toy_spectra()
    m = ch.field_matrix(chans, spectra.dl, ell)
    idx = [ch.field_index(chans, k, a, b) for k, a, b in ch.cross_pairs("s", chans, exp.spectra)]
    got = cross_covariance(m, [i for i, _ in idx], [j for _, j in idx], ell, exp.fsky, exp.bin_width)
    np.testing.assert_allclose(got, mock.knox_covariance(exp, spectra).covariance, rtol=1e-12)
    # Two channels: a cross spectrum carries no noise bias: its M is the sky alone, the autos add N_ℓ
    # (common knowledge: independent noise of two maps does not correlate).
    two = {**one, "95": {"nu_ghz": 95.0, "noise_uK_arcmin": 25.0, "beam_fwhm_arcmin": 7.0}}
    chans2 = ch.read_channels("spec.toml", two, tmp_path, exp.ell_max)
    m2 = ch.field_matrix(chans2, spectra.dl, ell)
    assert np.allclose(m2[:, 0, 2], spectra.dl["TT"][ell]) and np.all(m2[:, 0, 0] > m2[:, 0, 2])
