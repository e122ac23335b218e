"""Posterior-predictive check (infer.analysis.ppc) against the closed form of a linear-Gaussian model.

Reference (derived here, common knowledge of linear models): d = Aθ + n, n ~ N(0, C), flat prior. The
posterior is θ ~ N(θ̂, F⁻¹), F = AᵀC⁻¹A; χ²_obs(θ) = χ²_min + (θ − θ̂)ᵀF(θ − θ̂) with the second term χ²_P,
and χ²_rep ~ χ²_N independent of it, so p_B = P(χ²_N − χ²_P ≥ χ²_min) = ∫ f_{χ²_P}(u) S_{χ²_N}(χ²_min + u) du
(scipy.stats.chi2; Gelman, Meng & Stern 1996, Statistica Sinica 6, 733 for the p-value itself).
"""
import numpy as np
import pytest
from scipy import integrate, stats

from infer.analysis.ppc import predictive_check, select_draws


def _linear(seed, n=30, p=3, shift=0.0):
    rng = np.random.default_rng(seed)
    a = rng.normal(size=(n, p))
    cov = np.diag(rng.uniform(0.5, 2.0, n)) + 0.1
    d = a @ np.ones(p) + np.linalg.cholesky(cov) @ rng.standard_normal(n) + shift
    ci = np.linalg.inv(cov)
    f = a.T @ ci @ a
    theta_hat = np.linalg.solve(f, a.T @ ci @ d)
    r = d - a @ theta_hat
    chi2_min = float(r @ ci @ r)
    draws = rng.multivariate_normal(theta_hat, np.linalg.inv(f), size=20000)
    return d, cov, draws @ a.T, chi2_min, n, p


def _closed_form(chi2_min, n, p):
    val, _ = integrate.quad(lambda u: stats.chi2.pdf(u, p) * stats.chi2.sf(chi2_min + u, n), 0, np.inf)
    return val


@pytest.mark.parametrize("seed,shift", [(1, 0.0), (2, 0.0), (3, 0.6)])
def test_p_value_matches_the_linear_closed_form(seed, shift):
    d, cov, models, chi2_min, n, p = _linear(seed, shift=shift)
    res = predictive_check(d, cov, models, rng=seed)
    exact = _closed_form(chi2_min, n, p)
    assert abs(res.p_value - exact) < 4 * res.error, (res.p_value, exact, res.error)
    assert res.error == pytest.approx(np.sqrt(exact * (1 - exact) / 20000), rel=0.1)


def test_shifted_data_give_a_small_p_value():
    d, cov, models, chi2_min, n, p = _linear(4, shift=1.5)
    assert predictive_check(d, cov, models, rng=0).p_value < 0.01


def test_weighted_draws_follow_the_weights():
    idx = select_draws(4, 20000, weights=[0.0, 1.0, 3.0, 0.0], rng=0)
    assert set(idx) == {1, 2}
    assert np.mean(idx == 2) == pytest.approx(0.75, abs=0.02)
    assert len(set(select_draws(50, 20, rng=0))) == 20
