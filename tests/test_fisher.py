"""Tests of infer.forecast.fisher: the numerical Fisher matrix of any band-power model and its step check.

External references: the closed-form posterior of the linear-Gaussian model (Gelman et al. 2013,
*Bayesian Data Analysis*, 3rd ed., §14.2; conftest.analytic_posterior), derivatives from
``scipy.differentiate.jacobian`` (SciPy's adaptive finite-difference Jacobian), and the Hessian of
``scipy.stats.multivariate_normal.logpdf`` (Tegmark, Taylor & Heavens 1997, ApJ 480, 22:
F_ij = −∂²ln L/∂θ_i∂θ_j for a parameter-independent covariance).
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import differentiate

from infer import config
from infer.forecast import fisher_matrix, numerical_fisher
from infer.model.posterior import Posterior

from conftest import analytic_posterior, quick_config_text, gaussian_loglike_hessian


def test_linear_template_model_fisher_inverse_is_the_exact_posterior_covariance(tmp_path, quick_data):
    # Flat priors and a model linear in θ: the posterior is Gaussian with covariance (AᵀC⁻¹A)⁻¹
    # (Gelman et al. 2013, §14.2), which F⁻¹ must reproduce; central differences are exact for a
    # linear model, so the step check converges at its first halving.
    cfg_path = tmp_path / "run.toml"
    cfg_path.write_text(quick_config_text(quick_data, tmp_path / "c.h5"))
    cfg = config.load(cfg_path)
    post = Posterior(cfg)
    x0 = np.array([p.guess for p in cfg.sampled])
    result = numerical_fisher(post.model_bands, x0, np.full(4, 0.3), post.data.covariance,
                              names=post.names)
    _, exact_cov = analytic_posterior(quick_data)
    np.testing.assert_allclose(result.covariance(), exact_cov, rtol=1e-8)
    assert result.all_converged and np.all(result.change < 1e-9)
    assert result.evaluations == 2 * 4 * 2                    # one stencil at h, one at h/2
    np.testing.assert_array_equal(result.steps, np.full(4, 0.15))
    assert result.names == post.names


def _curved(theta):
    """An invented nonlinear band-power model (N = 12)."""
    ell = np.arange(12.0)
    a, b = theta[..., 0:1], theta[..., 1:2]
    return 100.0 * a**2 * np.exp(-ell / 7.0) + 30.0 * np.exp(b) * np.cos(ell / 3.0) + 5.0 * np.sin(a * b) * ell


def _cov(n=12, seed=3):
    rng = np.random.default_rng(seed)
    m = rng.normal(size=(n, n))
    return m @ m.T + n * np.eye(n)


def test_nonlinear_model_matches_scipy_jacobian():
    # Reference derivatives: scipy.differentiate.jacobian (adaptive, error-controlled) at θ0.
    theta0 = np.array([0.8, -0.4])
    cov = _cov()
    jac = differentiate.jacobian(lambda t: _curved(t.T).T, theta0).df     # (N, P)
    expect = fisher_matrix({"a": jac[:, 0], "b": jac[:, 1]}, cov)
    result = numerical_fisher(_curved, theta0, [0.5, 0.5], cov, names=("a", "b"), rtol=1e-6,
                              max_halvings=20)
    assert result.all_converged, result.summary()
    assert np.all(result.steps < 0.5)                          # the first step was too coarse
    np.testing.assert_allclose(result.matrix, expect, rtol=1e-5)
    np.testing.assert_allclose(result.derivs.T, jac, rtol=1e-5, atol=1e-6)


def test_vectorized_model_gives_the_same_result():
    theta0 = np.array([0.8, -0.4])
    cov = _cov()
    one = numerical_fisher(_curved, theta0, [0.5, 0.5], cov, rtol=1e-4)
    calls = []

    def batch(points):
        calls.append(len(points))
        return _curved(points)

    many = numerical_fisher(batch, theta0, [0.5, 0.5], cov, rtol=1e-4, vectorized=True)
    np.testing.assert_array_equal(one.matrix, many.matrix)
    assert sum(calls) == many.evaluations == one.evaluations and len(calls) >= 2


def test_step_check_flags_a_derivative_that_has_not_converged():
    # A model that varies on a scale of 0.01 with a first step of 1: after two halvings the central
    # difference is still far off, and the result must say so rather than pass as converged.
    def wiggly(theta):
        return np.sin(theta[0] / 0.01) * np.ones(5)

    cov = np.eye(5)
    result = numerical_fisher(wiggly, [0.2], [1.0], cov, max_halvings=2)
    assert not result.all_converged and result.change[0] > result.rtol
    assert "NOT converged" in result.summary()
    # With enough halvings it converges to the analytic derivative cos(θ/0.01)/0.01 per band.
    fine = numerical_fisher(wiggly, [0.2], [1.0], cov, rtol=1e-6, max_halvings=30)
    assert fine.all_converged
    np.testing.assert_allclose(fine.derivs[0], np.cos(20.0) / 0.01, rtol=1e-5)


def test_noisy_model_is_reported_not_converged():
    # Evaluation noise of 1e-6 (a Boltzmann code's accuracy floor, say) swamps differences at tiny
    # steps: halving only makes the estimate worse, and the check must report it.
    def noisy(theta):
        rng = np.random.default_rng(abs(hash(float(theta[0]))) % 2**32)
        return 2.0 * theta[0] * np.ones(4) + 1e-6 * rng.standard_normal(4)

    result = numerical_fisher(noisy, [1.0], [1e-9], np.eye(4) * 1e-4, max_halvings=3)
    assert not result.all_converged


def test_numerical_fisher_equals_minus_hessian_of_the_gaussian_log_likelihood():
    # F_ij = −∂²ln L/∂θ_i∂θ_j for a linear mean (Tegmark, Taylor & Heavens 1997); the Hessian is taken
    # by finite differences of scipy.stats.multivariate_normal.logpdf, an independent implementation.
    rng = np.random.default_rng(0)
    n, p = 10, 3
    cov = _cov(n, seed=1)
    design = rng.normal(size=(n, p))
    data = rng.normal(size=n)
    theta0 = np.array([0.3, -1.0, 2.0])
    hess = gaussian_loglike_hessian(data, design, cov, theta0)
    result = numerical_fisher(lambda t: design @ t, theta0, np.full(p, 0.1), cov)
    np.testing.assert_allclose(result.matrix, -hess, rtol=1e-7, atol=1e-10)


def test_bad_arguments_are_refused():
    with pytest.raises(ValueError, match="positive"):
        numerical_fisher(_curved, [0.8, -0.4], [0.1, 0.0], _cov())
    with pytest.raises(ValueError, match="band powers per point"):
        numerical_fisher(lambda t: np.ones(3), [0.8, -0.4], [0.1, 0.1], _cov())
