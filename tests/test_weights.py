"""Importance weights (infer.analysis.weights) against outside references.

References: ArviZ `psislw` (PyPI reference implementation of Vehtari, Simpson, Gelman, Yao & Gabry 2024,
JMLR 25(72)); scipy.stats densities and moments; Kish (1965, *Survey Sampling*) for the ESS formula;
numpy's Hazen quantile (Hyndman & Fan 1996, Am. Stat. 50, 361, type 5); the closed-form normalisation of a
Gaussian, (2π)^{P/2} |Σ|^{1/2}.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from infer.analysis import weights as W

arviz = pytest.importorskip("arviz")


def _weight_sets():
    rng = np.random.default_rng(20240701)
    out = {"lognormal-1": rng.normal(0.0, 1.0, 2000), "lognormal-2": rng.normal(3.0, 2.0, 500)}
    x = stats.t(4).rvs(4000, random_state=rng)          # target N(0,1), proposal Student-t₄: bounded weights
    out["student-t-ratio"] = stats.norm.logpdf(x) - stats.t(4).logpdf(x)
    x = stats.norm(0, 1).rvs(3000, random_state=rng)     # target N(0, 4²), proposal N(0, 1): heavy tail,
    # k = 1 − σ_q²/σ_p² asymptotically (our derivation), reached only slowly: k̂ is 0.66–0.98 by seed
    out["narrow-proposal"] = stats.norm(0, 4).logpdf(x) - stats.norm.logpdf(x)
    out["pareto-0.9"] = -0.9 * np.log(rng.uniform(size=1000))   # w = U^{-0.9}: generalised Pareto, k = 0.9
    out["tiny-S"] = rng.normal(size=20)                  # too few tail draws: k̂ = inf in both
    return out


@pytest.mark.parametrize("name", list(_weight_sets()))
def test_psis_matches_arviz(name):
    """k̂ and smoothed log weights equal ArviZ's psislw (reff = 1, normalised) to 1e-10."""
    lw = _weight_sets()[name]
    ref_lw, ref_k = arviz.psislw(lw.copy())
    res = W.psis(lw)
    if math.isinf(ref_k):
        assert math.isinf(res.k_hat)
    else:
        assert res.k_hat == pytest.approx(float(ref_k), abs=1e-10)
    np.testing.assert_allclose(res.log_weights, ref_lw, rtol=0, atol=1e-10)
    assert np.exp(res.log_weights).sum() == pytest.approx(1.0, abs=1e-12)


def test_psis_flags_heavy_tails():
    """Pareto weights w = U^{-0.9} (infinite variance, true k = 0.9) get k̂ > 0.7 and are flagged unreliable;
    generalised-Pareto weights with k = 0.3 (scipy.stats.genpareto) get k̂ within 0.15 of it; bounded
    weights (Student-t proposal for a normal target) get k̂ < 0.5 (Vehtari et al. 2024)."""
    sets = _weight_sets()
    res = W.psis(sets["pareto-0.9"])
    assert res.k_hat > 0.7 and not res.reliable and W.psis_khat(sets["pareto-0.9"]) == res.k_hat
    x = stats.genpareto(0.3).rvs(4000, random_state=np.random.default_rng(8))
    assert abs(W.psis(np.log(x)).k_hat - 0.3) < 0.15
    res = W.psis(sets["student-t-ratio"])
    assert res.k_hat < 0.5 and res.reliable


def test_pareto_k_threshold_formula():
    """min(1 − 1/log₁₀ S, 0.7) (Vehtari et al. 2024): 0.5 at S = 100, 0.7 from S ≈ 2154 on."""
    assert W.pareto_k_threshold(100) == pytest.approx(0.5)
    assert W.pareto_k_threshold(1000) == pytest.approx(1 - 1 / 3)
    assert W.pareto_k_threshold(10 ** 5) == 0.7


def test_kish_ess_of_known_weights():
    """Kish (1965): ESS = (Σw)²/Σw² — S for equal weights, 1 for one non-zero weight, 36/14 for (1, 2, 3)."""
    assert W.kish_ess(np.zeros(50)) == pytest.approx(50.0)
    assert W.kish_ess(np.array([0.0, -np.inf, -np.inf])) == pytest.approx(1.0)
    assert W.kish_ess(np.log([1.0, 2.0, 3.0]) + 700.0) == pytest.approx(36.0 / 14.0)
    with pytest.raises(ValueError):
        W.kish_ess(np.array([0.0, np.nan]))
    none = np.full(10, -np.inf)                               # every exact call failed: no information
    assert W.kish_ess(none) == 0.0 and math.isinf(W.psis_khat(none)) and W.log_evidence(none)[0] == -np.inf
    with pytest.raises(ValueError):
        W.weighted_mean(np.arange(10.0), none)


def test_defensive_mixture_density():
    """ln[(1−α)q₁ + α q₂] equals the direct sum of scipy.stats densities and integrates to one."""
    q1, q2, alpha = stats.norm(0.3, 0.5), stats.t(3, loc=0.0, scale=1.5), 0.1
    x = np.linspace(-30, 30, 2001)
    mine = W.defensive_log_density(q1.logpdf(x), q2.logpdf(x), alpha)
    np.testing.assert_allclose(np.exp(mine), (1 - alpha) * q1.pdf(x) + alpha * q2.pdf(x), rtol=1e-12, atol=0)
    total = integrate.quad(lambda t: math.exp(W.defensive_log_density(q1.logpdf(t), q2.logpdf(t), alpha)),
                           -np.inf, np.inf)[0]
    assert total == pytest.approx(1.0, abs=1e-8)
    # Hesterberg (1995): w = p/q ≤ p/(α q₂) — bounded for a target with lighter tails than q₂.
    p = stats.norm(0.0, 1.0)
    assert np.all(p.logpdf(x) - mine <= p.logpdf(x) - math.log(alpha) - q2.logpdf(x) + 1e-12)
    np.testing.assert_array_equal(W.defensive_log_density(q1.logpdf(x), q2.logpdf(x), 0.0), q1.logpdf(x))


def test_is_mean_sd_quantiles_of_gaussian_from_student_t():
    """Self-normalised IS of N(1.3, 0.7²) (unnormalised) from a Student-t₄ proposal: mean, sd and quantiles
    agree with scipy.stats within 4 Monte Carlo standard errors (Owen 2013, ch. 9)."""
    rng = np.random.default_rng(5)
    q = stats.t(4, loc=1.0, scale=1.0)
    x = q.rvs(20000, random_state=rng)
    target = stats.norm(1.3, 0.7)
    lw = target.logpdf(x) + 12.0 - q.logpdf(x)          # unnormalised target: the constant must not matter
    mean, se = W.weighted_mean(x, lw), W.mcse_weighted_mean(x, lw)
    assert abs(mean - target.mean()) < 4 * se
    assert 0 < se < 0.02
    sd = W.weighted_sd(x, lw)
    se_var = W.mcse_weighted_mean((x - mean) ** 2, lw)  # delta method for the variance, then for its root
    assert abs(sd - target.std()) < 4 * se_var / (2 * sd)
    ess = W.kish_ess(lw)
    for p in (0.05, 0.16, 0.5, 0.84, 0.95):
        qhat = W.weighted_quantile(x, lw, p)
        se_q = math.sqrt(p * (1 - p) / ess) / target.pdf(target.ppf(p))   # asymptotic quantile error
        assert abs(qhat - target.ppf(p)) < 4 * se_q


def test_weighted_quantile_equal_weights_is_hazen_and_sd_is_ddof1():
    """Equal weights reduce to numpy's 'hazen' quantiles and the ddof = 1 sample sd."""
    x = np.random.default_rng(3).normal(size=101)
    levels = np.array([0.0, 0.01, 0.16, 0.5, 0.84, 0.99, 1.0])
    np.testing.assert_allclose(W.weighted_quantile(x, np.zeros(101), levels),
                               np.quantile(x, levels, method="hazen"), rtol=0, atol=1e-12)
    assert W.weighted_sd(x, np.zeros(101)) == pytest.approx(np.std(x, ddof=1), rel=1e-12)
    assert W.weighted_mean(x, np.zeros(101)) == pytest.approx(np.mean(x), rel=1e-12)


def test_log_evidence_of_unnormalised_gaussian():
    """ln Z of p̃ = e^{2.5} exp(−½ (x−m)ᵀΣ⁻¹(x−m)) in 3-D: closed form 2.5 + ½ ln((2π)³ |Σ|), recovered
    within 4σ from a multivariate Student-t proposal; repeated estimates scatter as the error says."""
    m = np.array([0.5, -1.0, 2.0])
    cov = np.array([[1.0, 0.3, 0.0], [0.3, 0.5, 0.1], [0.0, 0.1, 2.0]])
    truth = 2.5 + 0.5 * math.log((2 * math.pi) ** 3 * np.linalg.det(cov))
    ref = stats.multivariate_normal(m, cov)
    q = stats.multivariate_t(loc=m + 0.2, shape=1.5 * cov, df=5)
    rng = np.random.default_rng(11)
    estimates, errors = [], []
    for _ in range(40):
        x = q.rvs(2000, random_state=rng)
        log_p = ref.logpdf(x) - ref.logpdf(m) + 2.5            # unnormalised: peak value e^{2.5}
        # the same proposal given unnormalised by e^{3}, its normalisation passed as ln Z_q = 3
        lnz, err = W.log_evidence(log_p - (q.logpdf(x) + 3.0), log_zq=3.0)
        estimates.append(lnz)
        errors.append(err)
    assert abs(estimates[0] - truth) < 4 * errors[0]
    pull = (np.array(estimates) - truth) / np.array(errors)
    assert abs(pull.mean()) < 4 / math.sqrt(40)
    assert 0.6 < pull.std() < 1.5


def test_deterministic_mixture_of_two_rounds_is_unbiased():
    """Two rounds (N(0, 2²), then Student-t₅ at 0.5) pooled by balance-heuristic weights (Owen & Zhou 2000):
    the mean of an unnormalised N(0.3, 1) is recovered within 4 MCSE, and (1/N)Σw estimates its normalisation
    Z without bias (average over 200 repetitions within 4 standard errors of the truth)."""
    target = stats.norm(0.3, 1.0)
    log_c = 1.7                                              # Z = e^{1.7}
    q = [stats.norm(0.0, 2.0), stats.t(5, loc=0.5)]
    n = np.array([300, 200])
    rng = np.random.default_rng(21)
    zs = []
    for rep in range(200):
        x = np.concatenate([q[0].rvs(n[0], random_state=rng), q[1].rvs(n[1], random_state=rng)])
        lw = W.deterministic_mixture_log_weights(target.logpdf(x) + log_c, [qr.logpdf(x) for qr in q], n)
        zs.append(np.exp(lw).mean())
        if rep == 0:
            assert abs(W.weighted_mean(x, lw) - 0.3) < 4 * W.mcse_weighted_mean(x, lw)
    zs = np.array(zs)
    assert abs(zs.mean() - math.exp(log_c)) < 4 * zs.std(ddof=1) / math.sqrt(len(zs))
    with pytest.raises(ValueError):
        W.deterministic_mixture_log_weights(np.zeros(5), np.zeros((2, 5)), [2, 2])
