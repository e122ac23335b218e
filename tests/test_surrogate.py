"""The band-power surrogate (infer.theory.surrogate, infer.theory.gp) against exact answers.

References: the linear template model, whose band powers are exactly linear in its amplitudes (A a with A
from `TemplateTheory.design_matrix`), so any regression containing the linear terms must reproduce it to
round-off; a smooth non-linear toy whose exact values are known in closed form; the volume law of a ball,
P(|z| < r/2) = 2^{-P}, for the design; h5py for storage of the plain arrays.
"""
from __future__ import annotations

import math

import h5py
import numpy as np
import pytest
from scipy import linalg

from infer import data as dataset
from infer.model.likelihood import BandPowerLikelihood
from infer.theory import gp
from infer.theory.surrogate import Surrogate, poly_terms, sobol_design
from infer.theory.templates import NAMES, TemplateTheory

from conftest import analytic_posterior


# A smooth non-linear toy: a damped power law, B_b = A e^{0.1 θ₁} (ℓ_b/500)^{0.05 θ₂} exp(−ℓ_b²/ℓ_d²),
# ℓ_d = 1200 (1 + 0.05 θ₃), with 1 %-plus-floor errors; θ is already "whitened" (μ = 0, Σ = I).
ELL = np.linspace(30.0, 2000.0, 120)
SIGMA = 0.01 * 1000.0 * np.exp(-ELL / 1500.0) + 1.0


def toy_bands(theta):
    t = np.atleast_2d(theta)
    amp = 1000.0 * np.exp(0.1 * t[:, :1])
    ld = 1200.0 * (1.0 + 0.05 * t[:, 2:3])
    return amp * (ELL / 500.0) ** (0.05 * t[:, 1:2]) * np.exp(-ELL ** 2 / ld ** 2)


def toy_dchi2(s, X):
    return np.sum(((s.predict_many(X) - toy_bands(X)) / SIGMA) ** 2, axis=1)


@pytest.fixture(scope="module")
def template_problem(quick_data):
    data = dataset.load(quick_data)
    theory = TemplateTheory(data.ell_max_needed, {})
    like = BandPowerLikelihood(data)
    mean, cov = analytic_posterior(quick_data)

    def bands(a):
        return like.model(theory.compute(dict(zip(NAMES, a))))

    return bands, linalg.cholesky(data.covariance, lower=True), mean, cov


@pytest.mark.parametrize("method", ["auto", "poly1", "poly2", "gp-m52-1", "gp-se-1"])
def test_exact_on_linear_template_model(template_problem, method):
    """B(a) is linear, so the surrogate must reproduce it to round-off: Δχ² < 1e-8, held out and reported."""
    bands, L, mean, cov = template_problem
    X = sobol_design(32, mean, cov, 4.0, lower=np.zeros(4), upper=np.full(4, 3.0), seed=2)
    s = Surrogate.fit(X, np.array([bands(x) for x in X]), L, mean, cov, method=method)
    rng = np.random.default_rng(4)
    for a in rng.multivariate_normal(mean, 4 * cov, size=10):
        assert s.dchi2(a, bands(a)) < 1e-8
    assert s.held_out_error()["worst_dchi2"] < 1e-8
    assert s.n_components == 4               # four amplitudes span the whitened band powers


@pytest.mark.slow
def test_held_out_error_falls_as_design_grows():
    """On the non-linear toy, the reported (k-fold) and independent-test RMS Δχ² fall with n = 20, 40, 80."""
    mu, cov = np.zeros(3), np.eye(3)
    test = np.random.default_rng(9).normal(size=(200, 3))
    reported, measured = [], []
    for n in (20, 40, 80):
        X = sobol_design(n, mu, cov, 4.0, seed=3)
        s = Surrogate.fit(X, toy_bands(X), np.diag(SIGMA), mu, cov)
        reported.append(s.held_out_error()["rms_dchi2"])
        measured.append(math.sqrt(np.mean(toy_dchi2(s, test) ** 2)))
    assert reported[0] > reported[1] > reported[2]
    assert measured[0] > measured[1] > measured[2]
    assert measured[2] < 0.05 and reported[2] < 1.0
    # cross-validation on a design of the 4σ shell is conservative for points drawn from N(0, I)
    assert all(r > m for r, m in zip(reported, measured))


def test_undertrained_surrogate_reports_large_error():
    """With P + 1 points only a GP on a constant mean is determined, and its held-out Δχ² is large
    (≫ 1, i.e. useless as a proposal), as is its error at new points; with fewer it refuses."""
    mu, cov = np.zeros(3), np.eye(3)
    X = sobol_design(4, mu, cov, 4.0, seed=3)
    s = Surrogate.fit(X, toy_bands(X), np.diag(SIGMA), mu, cov)
    assert s.method in ("gp-m52-0", "gp-se-0")
    assert s.held_out_error()["rms_dchi2"] > 100
    assert np.median(toy_dchi2(s, np.random.default_rng(1).normal(size=(50, 3)))) > 10
    with pytest.raises(ValueError, match="too few"):
        Surrogate.fit(X[:3], toy_bands(X[:3]), np.diag(SIGMA), mu, cov)


@pytest.mark.parametrize("method", ["poly3", "gp-se-1", "gp-m52-2"])
def test_vectorised_equals_one_by_one_and_round_trip(tmp_path, method):
    """predict_many equals predict point by point; to_arrays → HDF5 → from_arrays predicts bit-identically."""
    mu, cov = np.array([0.5, -1.0, 2.0]), np.diag([0.5, 2.0, 1.0])
    X = sobol_design(40, mu, cov, 4.0, seed=5)
    Y = toy_bands((X - mu) / np.sqrt(np.diag(cov)))
    s = Surrogate.fit(X, Y, np.diag(SIGMA), mu, cov, method=method, names=("x", "y", "z"))
    pts = np.random.default_rng(2).multivariate_normal(mu, cov, size=25)
    many = s.predict_many(pts)
    one = np.array([s.predict(p) for p in pts])
    np.testing.assert_allclose(one, many, rtol=1e-12, atol=1e-12 * np.abs(many).max())
    with h5py.File(tmp_path / "s.h5", "w") as f:
        for k, v in s.to_arrays().items():
            f[k] = v
    with h5py.File(tmp_path / "s.h5", "r") as f:
        back = Surrogate.from_arrays({k: f[k][()] for k in f})
    np.testing.assert_array_equal(back.predict_many(pts), many)
    np.testing.assert_array_equal(back.predict(pts[0]), s.predict(pts[0]))
    assert back.names == ("x", "y", "z") and back.method == method
    assert back.held_out_error() == s.held_out_error()
    assert all(isinstance(v, np.ndarray) and v.dtype != object for v in s.to_arrays().values())


def test_sobol_design_fills_the_ball_and_respects_bounds():
    """Uniform in the ellipsoid: every point within r σ, a fraction 2^{-P} within r/2 (ball volume law);
    clipped into the open prior support."""
    mu = np.array([1.0, 2.0, 3.0])
    A = np.array([[1.0, 0.0, 0.0], [0.5, 2.0, 0.0], [0.2, -0.3, 0.5]])
    cov = A @ A.T
    X = sobol_design(1024, mu, cov, 3.0, seed=1)
    r = np.sqrt(np.einsum("ij,ij->i", X - mu, np.linalg.solve(cov, (X - mu).T).T))
    assert r.max() <= 3.0 + 1e-9
    assert abs(np.mean(r < 1.5) - 1 / 8) < 0.02
    assert abs(np.mean(X[:, 0] > mu[0]) - 0.5) < 0.03
    lo, hi = np.array([0.0, -10, -10]), np.array([1.5, 10, 10])
    Xc = sobol_design(256, mu, cov, 3.0, lo, hi, seed=1)
    assert np.all(Xc > lo) and np.all(Xc < hi)
    np.testing.assert_array_equal(sobol_design(64, mu, cov, 3.0, seed=1), X[:64])  # nested prefixes


def test_polynomial_terms_and_gp_gradient():
    """All C(P+d, d) monomials once each; the GP's analytic marginal-likelihood gradient matches central
    finite differences (Rasmussen & Williams 2006, eq. 5.9)."""
    assert poly_terms(5, 3).shape == (math.comb(8, 3), 3)
    assert len({tuple(sorted(t)) for t in poly_terms(4, 2).tolist()}) == math.comb(6, 2)
    rng = np.random.default_rng(0)
    X = rng.normal(size=(25, 3))
    y = np.sin(X[:, 0]) + 0.3 * X[:, 1] ** 2
    d2 = (X[:, None, :] - X[None, :, :]).transpose(2, 0, 1) ** 2
    p = np.array([0.2, 0.1, 0.5, -0.3, math.log(0.05)])
    for kernel in gp.KERNELS:
        g = gp._nll_and_grad(p, X, y, kernel, d2)[1]
        for j in range(p.size):
            e = np.zeros(p.size)
            e[j] = 1e-5
            fd = (gp._nll_and_grad(p + e, X, y, kernel, d2)[0] - gp._nll_and_grad(p - e, X, y, kernel, d2)[0]) / 2e-5
            assert g[j] == pytest.approx(fd, rel=1e-5, abs=1e-6)


def test_bad_input_is_refused():
    mu, cov = np.zeros(3), np.eye(3)
    X = sobol_design(20, mu, cov, 4.0, seed=3)
    Y = toy_bands(X)
    with pytest.raises(ValueError, match="method"):
        Surrogate.fit(X, Y, np.diag(SIGMA), mu, cov, method="spline")
    with pytest.raises(ValueError, match="finite"):
        Surrogate.fit(X, np.where(np.arange(120) == 3, np.nan, Y), np.diag(SIGMA), mu, cov)
    with pytest.raises(ValueError, match="data_chol"):
        Surrogate.fit(X, Y, np.ones((120, 120)), mu, cov)
    with pytest.raises(ValueError, match="positive definite"):
        Surrogate.fit(X, Y, np.diag(SIGMA), mu, -np.eye(3))
    s = Surrogate.fit(X, Y, np.diag(SIGMA), mu, cov, method="poly2")
    with pytest.raises(ValueError, match="shape"):
        s.predict(np.zeros(4))
