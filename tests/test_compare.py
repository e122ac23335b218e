"""The shift between two runs (infer.analysis.shift) against closed forms.

References: scipy.stats.chi2 (PyPI reference library) for the Gaussian PTE of Q = Δμᵀ(C_A+C_B)⁻¹Δμ;
Raveri & Hu 2019, PRD 99, 043506: for Gaussian posteriors the difference posterior is Gaussian and the
mass above its zero contour is F_χ²_d(Q), so the mass estimate must agree with the Gaussian result.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from infer.analysis.shift import parameter_shift, sigma_from_mass

MA, MB = np.array([0.0, 0.0]), np.array([1.2, -0.8])
CA = np.array([[1.0, 0.3], [0.3, 0.5]])
CB = np.array([[0.6, -0.1], [-0.1, 0.8]])


def test_gaussian_shift_matches_chi2_and_raveri_hu_mass():
    rng = np.random.default_rng(5)
    xa = rng.multivariate_normal(MA, CA, size=20000)
    xb = rng.multivariate_normal(MB, CB, size=20000)
    # The kernel estimate of the density at zero carries noise of a few per cent at 4000 pairs (measured:
    # mass 0.597 at 4000 pairs, 0.539 at 16 000, true 0.552), hence the many pairs here.
    r = parameter_shift(xa, xb, pairs=16000, seed=1)
    dm = MA - MB
    q_true = dm @ np.linalg.solve(CA + CB, dm)
    # closed form with the true moments; the sample moments carry MC error of order 1/√n
    assert r.q == pytest.approx(q_true, rel=0.05)
    assert r.pte == pytest.approx(stats.chi2(2).sf(r.q), rel=1e-12)           # scipy.stats.chi2
    assert r.sigma_gauss == pytest.approx(stats.norm.isf(r.pte / 2), rel=1e-12)
    # Raveri & Hu: mass above the zero-difference contour = χ²₂ CDF of Q for a Gaussian difference;
    # the kernel estimate widens the density slightly (module docstring), so agreement to ~0.1 σ
    mass_true = stats.chi2(2).cdf(q_true)
    assert r.mass == pytest.approx(mass_true, abs=0.03)
    assert r.sigma == pytest.approx(np.sqrt(2) * special.erfinv(mass_true), abs=0.12)
    assert not r.lower_bound


def test_no_shift_is_insignificant_and_sigma_of_mass():
    rng = np.random.default_rng(6)
    xa = rng.multivariate_normal(MA, CA, size=5000)
    xb = rng.multivariate_normal(MA, CB, size=5000)
    r = parameter_shift(xa, xb, pairs=3000, seed=2)
    assert r.sigma < 0.6 and r.pte > 0.3
    assert sigma_from_mass(stats.norm.cdf(1) - stats.norm.cdf(-1)) == pytest.approx(1.0, abs=1e-12)


def test_weighted_draws_equal_resampled_ones():
    """Weights enter the pairs: draws from a wide Gaussian reweighted to the target give the same shift."""
    rng = np.random.default_rng(7)
    xa = rng.multivariate_normal(MA, 4 * CA, size=40000)
    lw = (stats.multivariate_normal(MA, CA).logpdf(xa) - stats.multivariate_normal(MA, 4 * CA).logpdf(xa))
    xb = rng.multivariate_normal(MB, CB, size=20000)
    r = parameter_shift(xa, xb, wa=np.exp(lw - lw.max()), pairs=4000, seed=3)
    dm = MA - MB
    assert r.q == pytest.approx(dm @ np.linalg.solve(CA + CB, dm), rel=0.08)
