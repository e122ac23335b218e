"""Tests of infer.forecast (experiment, knox, mock, fisher): Knox covariance, noise model, mock draws, experiment spec, Fisher matrix.

Each check names its external reference beside it. Spectra here are invented smooth analytic shapes
(no Boltzmann code): the checks concern the covariance and the generator, not cosmology.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import constants, stats

from infer import data as dataset
from infer import forecast as mock
from infer.errors import UserError
from infer.theory.base import Spectra

from conftest import gaussian_loglike_hessian

REPO = Path(__file__).resolve().parents[1]
KESTREL = REPO / "configs" / "kestrel.toml"


def toy_spectra(ell_max: int = 400) -> Spectra:
    """Invented smooth D_ℓ shapes in μK² (demo only): a TT bump, rising EE, TE with |ρ| < 1, small BB."""
    ell = np.arange(ell_max + 1, dtype=float)
    tt = 1200.0 + 4500.0 * np.exp(-(((ell - 220.0) / 110.0) ** 2))
    ee = 2.0 + 30.0 * (ell / 400.0) ** 2
    rho = 0.7 * np.sin(ell / 45.0)
    te = rho * np.sqrt(tt * ee)
    bb = 0.05 + 0.02 * (ell / 400.0)
    dl = {"TT": tt, "TE": te, "EE": ee, "BB": bb}
    for arr in dl.values():
        arr[:2] = 0.0
    return Spectra(ell_max=ell_max, dl=dl)


MC_EXP = mock.Experiment(name="Toy", fsky=1.0, noise_uK_arcmin=40.0, beam_fwhm_arcmin=20.0,
                         ell_min=30, ell_max=269, bin_width=30, spectra=("TT", "TE", "EE", "BB"))
N_SIM = 3000


@pytest.fixture(scope="module")
def wishart_mc():
    """Band powers of N_SIM full-sky Gaussian skies. Per ℓ, (2ℓ+1)·Ĉ_ℓ of Gaussian a_ℓm with covariance
    M_ℓ = C_ℓ + N_ℓ is Wishart with 2ℓ+1 degrees of freedom and scale M_ℓ (Percival & Brown 2006,
    MNRAS 372, 1104 — common knowledge); samples drawn by scipy.stats.wishart (external reference)."""
    exp, spectra = MC_EXP, toy_spectra()
    rng = np.random.default_rng(12345)
    nb, width = exp.n_bins, exp.bin_width
    sims = np.zeros((N_SIM, 4 * nb))
    for ell in range(exp.ell_min, exp.ell_min + nb * width):
        nt = mock.noise_dl(ell, exp.noise_uK_arcmin, exp.beam_fwhm_arcmin)
        npol = nt * exp.pol_noise_factor**2
        dl = {k: v[ell] for k, v in spectra.dl.items()}
        scale = np.array([[dl["TT"] + nt, dl["TE"], 0.0],
                          [dl["TE"], dl["EE"] + npol, 0.0],
                          [0.0, 0.0, dl["BB"] + npol]])
        df = 2 * ell + 1
        w = stats.wishart.rvs(df=df, scale=scale, size=N_SIM, random_state=rng) / df
        b = (ell - exp.ell_min) // width
        for p, (i, j) in enumerate(((0, 0), (0, 1), (1, 1), (2, 2))):    # TT, TE, EE, BB
            sims[:, p * nb + b] += w[:, i, j] / width
    return sims


def test_knox_covariance_matches_wishart_monte_carlo(wishart_mc):
    # Reference: sample covariance of scipy.stats.wishart draws (see the fixture). Its standard error for
    # (near-)Gaussian band powers: (n−1)S is Wishart(n−1, Σ), so Var(s_ab) ≈ (Σ_aa Σ_bb + Σ_ab²)/n
    # (standard multivariate statistics, e.g. Anderson 2003, An Introduction to Multivariate
    # Statistical Analysis, Wiley — from memory).
    knox = mock.knox_covariance(MC_EXP, toy_spectra()).covariance
    sample = np.cov(wishart_mc, rowvar=False)
    sd = np.sqrt(np.diag(knox))
    se = np.sqrt((np.outer(sd**2, sd**2) + knox**2) / N_SIM)
    z = (sample - knox) / se
    assert np.max(np.abs(z)) < 5.0, f"max |z| = {np.max(np.abs(z)):.2f}"

    # Diagonal: relative agreement within 4 MC standard errors of a variance, √(2/n) ≈ 2.6 %.
    rel = np.diag(sample) / np.diag(knox) - 1.0
    assert np.max(np.abs(rel)) < 4.0 * math.sqrt(2.0 / N_SIM), f"max diag deviation {np.max(np.abs(rel)):.3%}"

    # TT–TE–EE cross blocks within one bin: the correlation coefficients agree within MC error
    # (Fisher z-transform standard error 1/√(n−3) — common practice).
    nb = MC_EXP.n_bins
    r_knox = knox / np.outer(sd, sd)
    sd_s = np.sqrt(np.diag(sample))
    r_mc = sample / np.outer(sd_s, sd_s)
    for p, q in ((0, 1), (0, 2), (1, 2)):                  # TT–TE, TT–EE, TE–EE
        for b in range(nb):
            a, c = p * nb + b, q * nb + b
            dz = np.arctanh(r_mc[a, c]) - np.arctanh(r_knox[a, c])
            assert abs(dz) * math.sqrt(N_SIM - 3) < 5.0, (p, q, b, r_mc[a, c], r_knox[a, c])
    # The TT–EE cross term 2(C^TE)² is really exercised: some bins are strongly correlated.
    assert np.max(np.abs(r_knox[0:nb, 2 * nb:3 * nb])) > 0.2
    # BB is uncorrelated with T and E (parity); the Knox blocks are exactly zero.
    assert np.all(knox[3 * nb:, :3 * nb] == 0.0)


def test_wishart_monte_carlo_mean_is_binned_signal_plus_noise(wishart_mc):
    # Reference: E[W/df] = scale for a Wishart draw (scipy.stats.wishart documentation).
    exp, spectra = MC_EXP, toy_spectra()
    bp = mock.simulate(exp, spectra, realise=False)
    ell = bp.window_ell
    noise = mock.noise_dl(ell, exp.noise_uK_arcmin, exp.beam_fwhm_arcmin)
    npol = noise * exp.pol_noise_factor**2
    nb = exp.n_bins
    expect = bp.value.copy()
    expect[:nb] += bp.window[:nb] @ noise
    expect[2 * nb:3 * nb] += bp.window[2 * nb:3 * nb] @ npol
    expect[3 * nb:] += bp.window[3 * nb:] @ npol
    se = np.sqrt(np.diag(bp.covariance) / N_SIM)
    assert np.max(np.abs(wishart_mc.mean(axis=0) - expect) / se) < 5.0


def test_knox_single_multipole_variance_formula():
    # Knox 1995, Phys. Rev. D 52, 4307: ΔC_ℓ = sqrt(2/((2ℓ+1) f_sky)) (C_ℓ + N_ℓ) for TT; with the same
    # Gaussian argument Var(TE) = [(C^TT+N^T)(C^EE+N^P) + (C^TE)²]/((2ℓ+1) f_sky).
    spectra = toy_spectra()
    exp = mock.Experiment("Toy", 0.4, 30.0, 7.0, 100, 109, 1, ("TT", "TE", "EE"))
    bands = mock.knox_covariance(exp, spectra)
    ell = np.arange(100, 110)
    nt = mock.noise_dl(ell, 30.0, 7.0)
    npol = 2.0 * nt
    tt, te, ee = (spectra.dl[k][ell] for k in ("TT", "TE", "EE"))
    modes = (2 * ell + 1) * 0.4
    var = np.diag(bands.covariance)
    np.testing.assert_allclose(var[:10], 2 * (tt + nt) ** 2 / modes, rtol=1e-12)
    np.testing.assert_allclose(var[10:20], ((tt + nt) * (ee + npol) + te**2) / modes, rtol=1e-12)
    np.testing.assert_allclose(var[20:], 2 * (ee + npol) ** 2 / modes, rtol=1e-12)
    cross = np.diag(bands.covariance[:10, 20:])
    np.testing.assert_allclose(cross, 2 * te**2 / modes, rtol=1e-12)


def test_knox_covariance_scales_as_inverse_fsky():
    # Knox 1995: the number of modes, hence the inverse variance, is proportional to f_sky.
    spectra = toy_spectra()
    full = mock.knox_covariance(MC_EXP, spectra).covariance
    exp = mock.Experiment(**{**MC_EXP.__dict__, "fsky": 0.3})
    part = mock.knox_covariance(exp, spectra).covariance
    np.testing.assert_allclose(part, full / 0.3, rtol=1e-13)


def test_noise_dl_against_hand_computation():
    # Arcminute → radian from CODATA/SI via scipy.constants.arcmin; beam σ_b = FWHM/(2√(2 ln 2)) and
    # B_ℓ = exp(−ℓ(ℓ+1)σ_b²/2) (Knox 1995, Phys. Rev. D 52, 4307).
    arcmin = constants.arcmin
    ell = 1000
    sigma_b = 5.0 * arcmin / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    beam = math.exp(-ell * (ell + 1) * sigma_b**2 / 2.0)
    n_ell = (25.0 * arcmin) ** 2 / beam**2
    expect = ell * (ell + 1) * n_ell / (2.0 * math.pi)
    assert mock.noise_dl(ell, 25.0, 5.0) == pytest.approx(expect, rel=1e-12)
    # By hand: σ = 1 μK·arcmin, no beam, ℓ = 1: D = (2/2π)(π/10800)² = π/10800² = 2.6933850e-8 μK².
    assert mock.noise_dl(1, 1.0, 0.0) == pytest.approx(2.6933850e-8, rel=1e-7)
    assert np.all(mock.noise_dl(np.arange(2, 50), 0.0, 5.0) == 0.0)


def test_polarisation_noise_factor_enters_squared():
    # Common practice: σ_P = factor·σ_T, so N^EE = factor²·N^TT; zero-signal Var(EE) = 2(N^EE)²/(2ℓ+1)
    # and Var(TE) = N^TT N^EE/(2ℓ+1), no TE noise (Knox 1995 generalised; see module docstring).
    zero = Spectra(200, {k: np.zeros(201) for k in ("TT", "TE", "EE", "BB")})
    exp = mock.Experiment("Toy", 1.0, 10.0, 3.0, 150, 151, 1, ("TT", "TE", "EE", "BB"),
                          pol_noise_factor=2.0)
    cov = mock.knox_covariance(exp, zero).covariance
    nt = mock.noise_dl(np.array([150, 151]), 10.0, 3.0)
    modes = 2 * np.array([150, 151]) + 1
    np.testing.assert_allclose(np.diag(cov)[:2], 2 * nt**2 / modes, rtol=1e-12)
    np.testing.assert_allclose(np.diag(cov)[2:4], nt * 4 * nt / modes, rtol=1e-12)
    np.testing.assert_allclose(np.diag(cov)[4:6], 2 * (4 * nt) ** 2 / modes, rtol=1e-12)
    np.testing.assert_allclose(np.diag(cov)[6:8], 2 * (4 * nt) ** 2 / modes, rtol=1e-12)


def test_simulate_without_realisation_is_binned_theory():
    spectra = toy_spectra()
    bp = mock.simulate(MC_EXP, spectra, realise=False)
    assert bp.units == "Dl_uK2" and bp.experiment == "Toy"
    assert bp.spectra == ("TT", "TE", "EE", "BB")
    for k in bp.spectra:
        rows = bp.kind == k
        np.testing.assert_allclose(bp.value[rows], bp.window[rows] @ spectra.dl[k][bp.window_ell],
                                   rtol=1e-13)
        # top-hat in D_ℓ: weight 1/30 on each of the band's multipoles
        assert np.allclose(bp.window[rows].max(axis=1), 1 / 30)
    assert len(bp) == 4 * MC_EXP.n_bins
    np.testing.assert_array_equal(bp.covariance, mock.knox_covariance(MC_EXP, spectra).covariance)


def test_simulate_draws_are_seeded_and_chi2_distributed():
    # Reference: scipy.stats.chi2 — the χ² of a Gaussian draw about its mean with its own covariance
    # has N degrees of freedom; Kolmogorov–Smirnov test via scipy.stats.kstest.
    spectra = toy_spectra()
    exp = mock.Experiment("Toy", 0.5, 20.0, 5.0, 30, 149, 20, ("TT", "TE", "EE"))
    mean = mock.simulate(exp, spectra, realise=False)
    a = mock.simulate(exp, spectra, seed=7)
    b = mock.simulate(exp, spectra, seed=7)
    c = mock.simulate(exp, spectra, seed=8)
    np.testing.assert_array_equal(a.value, b.value)
    assert not np.allclose(a.value, c.value)
    inv = np.linalg.inv(mean.covariance)
    chi2 = []
    for seed in range(300):
        r = mock.simulate(exp, spectra, seed=seed).value - mean.value
        chi2.append(r @ inv @ r)
    assert stats.kstest(chi2, stats.chi2(df=len(mean)).cdf).pvalue > 1e-3


def test_simulated_dataset_round_trips_through_hdf5(tmp_path):
    bp = mock.simulate(MC_EXP, toy_spectra(), seed=3)
    path = tmp_path / "toy.h5"
    dataset.write(bp, path, description="toy mock")
    back = dataset.load(path, theory_ell_max=MC_EXP.ell_max)
    for name in ("kind", "ell_lo", "ell_hi", "ell_eff", "value", "covariance", "window_ell", "window"):
        np.testing.assert_array_equal(getattr(back, name), getattr(bp, name))
    assert back.experiment == "Toy"


def test_simulate_checks_theory_reach():
    short = toy_spectra(ell_max=200)
    with pytest.raises(UserError, match="needs theory spectra up to ℓ = 269"):
        mock.simulate(MC_EXP, short)
    spectra = toy_spectra()
    del spectra.dl["TE"]
    with pytest.raises(UserError, match="lack TE"):
        mock.knox_covariance(MC_EXP, spectra)


# --------------------------------------------------------------------------------- experiment spec

def test_kestrel_spec():
    exp, fiducial, options = mock.read_experiment(KESTREL)
    assert exp.name == "Kestrel"
    assert exp.spectra == ("TT", "TE", "EE")
    assert exp.n_bins == 49 and exp.bin_edges()[1][-1] == exp.ell_max
    assert set(mock.FIDUCIAL_REQUIRED) <= set(fiducial)
    assert fiducial == {"omega_b": 0.0224, "omega_c": 0.120, "H0": 67.5, "ln_As_1e10": 3.05,
                        "n_s": 0.965, "tau": 0.055, "sum_mnu_eV": 0.06, "n_eff": 3.044}
    assert isinstance(options["seed"], int) and options["realise"] is True
    assert options["output"].parent == KESTREL.parent / "data"


GOOD_SPEC = """
[experiment]
name = "Toy"
fsky = 0.5
noise_uK_arcmin = 20.0
beam_fwhm_arcmin = 4.0
ell_min = 30
ell_max = 329
bin_width = 30
spectra = ["TT", "EE"]

[fiducial]
omega_b = 0.0224
omega_c = 0.120
H0 = 67.5
ln_As_1e10 = 3.05
n_s = 0.965
tau = 0.055

[mock]
seed = 4
"""


def test_good_spec_reads(tmp_path):
    path = tmp_path / "toy.toml"
    path.write_text(GOOD_SPEC)
    exp, fiducial, options = mock.read_experiment(path)
    assert exp.pol_noise_factor == pytest.approx(math.sqrt(2))
    assert exp.n_bins == 10 and options["seed"] == 4 and options["output"] is None
    assert len(fiducial) == 6


@pytest.mark.parametrize("old, new, key", [
    ("fsky = 0.5", "fsky = 0.5\nfksy = 0.4", "fksy"),                   # unknown key
    ("fsky = 0.5", "", "fsky"),                                         # missing key
    ("fsky = 0.5", 'fsky = "0.5"', "fsky"),                             # wrong type
    ("fsky = 0.5", "fsky = 1.5", "fsky"),                               # out of range
    ("noise_uK_arcmin = 20.0", "noise_uK_arcmin = -1.0", "noise_uK_arcmin"),
    ("ell_min = 30", "ell_min = 1", "ell_min"),
    ("ell_min = 30", "ell_min = 30.5", "ell_min"),
    ("bin_width = 30", "bin_width = 0", "bin_width"),
    ("ell_max = 329", "ell_max = 40", "ell_max"),
    ('spectra = ["TT", "EE"]', 'spectra = ["TT", "TB"]', "spectra"),
    ('spectra = ["TT", "EE"]', 'spectra = "TT"', "spectra"),
    ("tau = 0.055", "tau = 0.055\nomega_cdm = 0.12", "omega_cdm"),       # unknown parameter
    ("H0 = 67.5", "", "H0"),                                            # missing parameter
    ("H0 = 67.5", 'H0 = "fast"', "H0"),
    ("H0 = 67.5", "H0 = -67.5", "H0"),
    ("seed = 4", "seed = -4", "seed"),
    ("seed = 4", "speed = 4", "speed"),
    ("[mock]", "[sampler]", "sampler"),                                 # unknown table
    ("[fiducial]", "[fid]", "fid"),
])
def test_bad_spec_names_file_and_key(tmp_path, old, new, key):
    path = tmp_path / "bad.toml"
    assert old in GOOD_SPEC
    path.write_text(GOOD_SPEC.replace(old, new, 1))
    with pytest.raises(UserError) as err:
        mock.read_experiment(path)
    msg = str(err.value)
    assert str(path) in msg and key in msg and "\n" not in msg


def test_bad_toml_and_missing_spec(tmp_path):
    path = tmp_path / "broken.toml"
    path.write_text("[experiment\nname = 1")
    with pytest.raises(UserError, match="not valid TOML") as err:
        mock.read_experiment(path)
    assert str(path) in str(err.value)
    with pytest.raises(UserError, match="not found"):
        mock.read_experiment(tmp_path / "absent.toml")


def test_experiment_object_validates():
    with pytest.raises(UserError, match="fsky"):
        mock.Experiment("Toy", 0.0, 10.0, 5.0, 30, 100, 10, ("TT",))
    with pytest.raises(UserError, match="spectra"):
        mock.Experiment("Toy", 0.5, 10.0, 5.0, 30, 100, 10, ("TT", "TT"))


# ---------------------------------------------------------------------------------- Fisher matrix

def test_fisher_matrix_equals_hessian_of_gaussian_log_likelihood():
    # Tegmark, Taylor & Heavens 1997, ApJ 480, 22: F_ij = −∂²ln L/∂θ_i∂θ_j; for a mean linear in θ and
    # a fixed covariance this is exactly dᵀC⁻¹d. Reference log-likelihood: scipy.stats.multivariate_normal.
    rng = np.random.default_rng(0)
    n, p = 12, 3
    a = rng.normal(size=(n, n))
    cov = a @ a.T + n * np.eye(n)
    design = rng.normal(size=(n, p))
    data = rng.normal(size=n)
    theta0 = np.array([0.3, -1.0, 2.0])
    hess = gaussian_loglike_hessian(data, design, cov, theta0)
    fisher = mock.fisher_matrix({f"q{i}": design[:, i] for i in range(p)}, cov)
    np.testing.assert_allclose(fisher, -hess, rtol=1e-7, atol=1e-10)


def test_fisher_matrix_of_amplitude_gives_knox_signal_to_noise():
    # For B = A·B_fid, F_AA = B_fidᵀ C⁻¹ B_fid; with single-ℓ bands and cosmic variance only, each ℓ
    # contributes (2ℓ+1) f_sky / 2, the number of modes over two (Knox 1995, Phys. Rev. D 52, 4307).
    flat = Spectra(300, {k: np.full(301, 100.0) for k in ("TT", "TE", "EE", "BB")})
    exp = mock.Experiment("Toy", 0.5, 0.0, 0.0, 200, 209, 1, ("TT",))
    bp = mock.simulate(exp, flat, realise=False)
    fisher = mock.fisher_matrix({"A": bp.value}, bp.covariance)
    modes = np.sum((2 * np.arange(200, 210) + 1) * 0.5)
    assert fisher[0, 0] == pytest.approx(modes / 2.0, rel=1e-12)
