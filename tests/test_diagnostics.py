"""Tests of infer.diagnostics against external references.

References used (named beside each check):
* ArviZ 0.23 (``arviz.rhat(method="rank")``, ``arviz.ess(method="bulk"/"tail")``), an
  implementation of Vehtari, Gelman, Simpson, Carpenter & Bürkner (2021),
  Bayesian Analysis 16, 667.
* emcee's ``emcee.autocorr.integrated_time`` (Foreman-Mackey et al. 2013, PASP 125, 306),
  which expects arrays shaped (steps, walkers[, params]).
* The analytic integrated autocorrelation time of a Gaussian AR(1) process,
  τ = (1 + ρ)/(1 − ρ), a textbook fact (e.g. Sokal 1997, "Monte Carlo methods in
  statistical mechanics", lecture notes; quoted from memory).
"""

import math
import warnings

import emcee
import numpy as np
import pytest
from scipy import signal, stats

with warnings.catch_warnings():
    warnings.simplefilter("ignore", FutureWarning)
    import arviz as az  # a declared test dependency: a missing install must fail loudly

from infer.analysis import diagnostics as dg

REL_ARVIZ = 0.01  # agreement required with ArviZ
REL_EMCEE = 1e-8  # agreement required with emcee


def ar1(rng, rho, chains, draws):
    """Stationary Gaussian AR(1) draws x_t = ρ x_{t−1} + sqrt(1−ρ²) ε_t, unit variance.

    Shape (chains, draws); the first draw is already from N(0, 1).
    """
    eps = rng.standard_normal((chains, draws))
    previous = rng.standard_normal((chains, 1))
    x, _ = signal.lfilter([math.sqrt(1.0 - rho**2)], [1.0, -rho], eps, axis=1, zi=rho * previous)
    return x


def _case(name):
    rng = np.random.default_rng(20240601 + sum(map(ord, name)))
    if name == "iid_4x1000":
        return rng.standard_normal((4, 1000))
    if name == "ar1_0.95_4x1000":
        return ar1(rng, 0.95, 4, 1000)
    if name == "student_t2.5_4x1000":
        return rng.standard_t(2.5, (4, 1000))
    if name == "cauchy_4x1000":
        return rng.standard_cauchy((4, 1000))
    if name == "stuck_4x1000":
        x = rng.standard_normal((4, 1000))
        x[0] += 3.0  # one chain offset by +3 sd
        return x
    if name == "iid_2x500":
        return rng.standard_normal((2, 500))
    if name == "ar1_0.7_8x251":  # odd length: the middle draw is dropped when splitting
        return ar1(rng, 0.7, 8, 251)
    if name == "t2.5_3x1001":
        return rng.standard_t(2.5, (3, 1001))
    if name == "ar1_0.9_16x300":
        return ar1(rng, 0.9, 16, 300)
    if name == "poisson_ties_4x1000":  # heavy ties exercise the average-rank handling
        return rng.poisson(3.0, (4, 1000)).astype(float)
    raise KeyError(name)


CASES = [
    "iid_4x1000",
    "ar1_0.95_4x1000",
    "student_t2.5_4x1000",
    "cauchy_4x1000",
    "stuck_4x1000",
    "iid_2x500",
    "ar1_0.7_8x251",
    "t2.5_3x1001",
    "ar1_0.9_16x300",
    "poisson_ties_4x1000",
]


# --------------------------------------------------------------------------- R̂ and ESS


@pytest.mark.parametrize("name", CASES)
def test_rhat_matches_arviz(name):
    x = _case(name)
    # Reference: ArviZ 0.23 arviz.rhat(method="rank"); Vehtari et al. 2021, Bayesian Anal. 16, 667
    reference = float(az.rhat(x, method="rank"))
    assert dg.split_rhat(x) == pytest.approx(reference, rel=REL_ARVIZ)


@pytest.mark.parametrize("name", CASES)
def test_ess_bulk_matches_arviz(name):
    x = _case(name)
    # Reference: ArviZ 0.23 arviz.ess(method="bulk"), Vehtari et al. 2021
    assert dg.ess_bulk(x) == pytest.approx(float(az.ess(x, method="bulk")), rel=REL_ARVIZ)


@pytest.mark.parametrize("name", CASES)
def test_ess_tail_matches_arviz(name):
    x = _case(name)
    # Reference: ArviZ 0.23 arviz.ess(method="tail"), min over the 5% and 95% quantile indicators
    # (Vehtari et al. 2021)
    assert dg.ess_tail(x) == pytest.approx(float(az.ess(x, method="tail")), rel=REL_ARVIZ)


def test_average_ranks_match_scipy():
    rng = np.random.default_rng(2)
    for values in (rng.standard_normal(501), rng.integers(0, 4, 500).astype(float), np.ones(5)):
        # Reference: scipy.stats.rankdata(method="average")
        expected = stats.rankdata(values, method="average")
        np.testing.assert_array_equal(dg._average_ranks(values), expected)


def test_rhat_flags_stuck_chain_and_passes_mixed_chains():
    # Vehtari et al. 2021 recommend using draws only when R̂ < 1.01.
    assert dg.split_rhat(_case("iid_4x1000")) < 1.01
    assert dg.split_rhat(_case("stuck_4x1000")) > 1.2


def test_single_chain_split_rhat_tests_stationarity():
    # Splitting a single chain compares its halves (Vehtari et al. 2021, Sect. on split-R̂);
    # ArviZ returns nan for one chain, so this is checked against the expected behaviour.
    rng = np.random.default_rng(7)
    steady = rng.standard_normal((1, 4000))
    drifting = steady + np.linspace(0.0, 3.0, 4000)
    assert dg.split_rhat(steady) < 1.01
    assert dg.split_rhat(drifting) > 1.2
    assert dg.split_rhat(steady[0]) == dg.split_rhat(steady)  # 1-D input is one chain


def test_constant_chains_give_nan_without_warnings():
    constant = np.full((4, 200), 2.5)
    disagreeing = np.repeat(np.arange(4.0)[:, None], 200, axis=1)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert math.isnan(dg.split_rhat(constant))
        assert math.isnan(dg.ess_bulk(constant))
        assert math.isnan(dg.ess_tail(constant))
        assert math.isnan(dg.autocorr_time(constant))
        assert math.isnan(dg.ess_autocorr(constant))
        assert dg.split_rhat(disagreeing) == math.inf
        assert math.isnan(dg.ess_bulk(disagreeing))
        # a single stuck walker among moving ones: R̂ and ESS stay defined, τ does not
        x = np.random.default_rng(3).standard_normal((4, 200))
        x[1] = 0.3
        assert math.isfinite(dg.split_rhat(x)) and dg.split_rhat(x) > 1.01
        assert math.isfinite(dg.ess_bulk(x)) and math.isfinite(dg.ess_tail(x))
        assert math.isnan(dg.autocorr_time(x))


def test_unusable_input_gives_nan():
    x = np.random.default_rng(5).standard_normal((4, 100))
    x[2, 17] = np.nan
    short = np.ones((4, 3))
    for f in (dg.split_rhat, dg.ess_bulk, dg.ess_tail, dg.autocorr_time):
        assert math.isnan(f(x))
        assert math.isnan(f(short))
    with pytest.raises(ValueError):
        dg.split_rhat(np.zeros((2, 3, 4)))


# --------------------------------------------------------------------------- τ_int


@pytest.fixture(scope="module")
def long_ar1():
    # 64 walkers × 50000 steps: Sokal's (1997) variance estimate var(τ̂)/τ² ≈ 2(2M+1)/N
    # gives a relative standard error ≈ 1.1% for ρ = 0.9 (M ≈ 5τ ≈ 95, N = 3.2e6),
    # so 5% is a ≥4σ margin.
    rng = np.random.default_rng(11)
    return {rho: ar1(rng, rho, 64, 50_000) for rho in (0.5, 0.9)}


@pytest.mark.parametrize("rho", [0.5, 0.9])
def test_autocorr_time_matches_emcee_and_ar1_theory(long_ar1, rho):
    x = long_ar1[rho]  # (walkers, steps)
    tau = dg.autocorr_time(x)
    # Reference: emcee.autocorr.integrated_time, input shaped (steps, walkers, params)
    reference = emcee.autocorr.integrated_time(x.T[:, :, None], c=5, tol=0)[0]
    assert tau == pytest.approx(reference, rel=REL_EMCEE)
    # Reference: analytic AR(1) τ = (1+ρ)/(1−ρ) (textbook fact, e.g. Sokal 1997 lecture notes)
    analytic = (1.0 + rho) / (1.0 - rho)
    assert tau == pytest.approx(analytic, rel=0.05)
    # ESS from τ: N/τ, compared with the analytic N(1−ρ)/(1+ρ)
    ess = dg.ess_autocorr(x)
    assert ess == pytest.approx(x.size / tau, rel=1e-12)
    assert ess == pytest.approx(x.size / analytic, rel=0.05)
    assert dg.autocorr_reliable(x, tau)


@pytest.mark.parametrize("name", CASES)
def test_autocorr_time_matches_emcee_on_small_cases(name):
    x = _case(name)
    # Reference: emcee.autocorr.integrated_time, (steps, walkers) layout, tol=0 (never raises)
    reference = emcee.autocorr.integrated_time(x.T, c=5, tol=0)[0]
    assert dg.autocorr_time(x) == pytest.approx(reference, rel=REL_EMCEE)


@pytest.mark.parametrize("c", [3.0, 8.0])
def test_autocorr_time_window_constant_matches_emcee(c):
    x = _case("ar1_0.95_4x1000")
    # Reference: emcee.autocorr.integrated_time with the same Sokal window constant c
    reference = emcee.autocorr.integrated_time(x.T, c=c, tol=0)[0]
    assert dg.autocorr_time(x, c=c) == pytest.approx(reference, rel=REL_EMCEE)


def test_short_chain_returns_estimate_and_reliability_agrees_with_emcee():
    rng = np.random.default_rng(13)
    short = ar1(rng, 0.9, 32, 400)  # τ ≈ 19, 50τ ≈ 950 > 400 steps
    long = ar1(rng, 0.5, 32, 2000)  # τ ≈ 3, 50τ ≈ 150 < 2000 steps
    tau_short = dg.autocorr_time(short)  # must not raise
    assert math.isfinite(tau_short)
    assert not dg.autocorr_reliable(short, tau_short)
    # Reference: emcee refuses the same estimate (AutocorrError when tol·τ > steps, tol = 50)
    with pytest.raises(emcee.autocorr.AutocorrError):
        emcee.autocorr.integrated_time(short.T, tol=50)
    tau_long = dg.autocorr_time(long)
    assert dg.autocorr_reliable(long, tau_long)
    emcee.autocorr.integrated_time(long.T, tol=50)  # accepted by emcee as well
    assert not dg.autocorr_reliable(long, math.nan)
    assert dg.autocorr_reliable(long, 40.0)  # boundary: 2000 steps == 50 × 40
    assert not dg.autocorr_reliable(long, 40.5)
    assert dg.autocorr_reliable(long, 40.5, factor=40)


# --------------------------------------------------------------------------- bookkeeping


def test_acceptance_fraction_on_constructed_positions():
    steps, walkers, params = 5, 3, 2
    pos = np.zeros((steps, walkers, params))
    pos[:, 0, :] = np.arange(steps)[:, None]  # moves at every step -> 4/4
    pos[:, 1, :] = 7.0  # never moves -> 0/4
    pos[:, 2, 0] = [0.0, 0.0, 1.0, 1.0, 2.0]  # moves at steps 2 and 4, first parameter only -> 2/4
    pos[:, 2, 1] = 5.0
    np.testing.assert_array_equal(dg.acceptance_fraction(pos), [1.0, 0.0, 0.5])
    assert np.isnan(dg.acceptance_fraction(pos[:1])).all()
    with pytest.raises(ValueError):
        dg.acceptance_fraction(pos[:, :, 0])


def test_burn_in_rule():
    assert dg.burn_in(10.0, 1000) == 50
    assert dg.burn_in(10.01, 1000) == 51  # ceil(50.05)
    assert dg.burn_in(10.0, 1000, factor=2.0) == 20
    assert dg.burn_in(0.0, 1000) == 0
    assert dg.burn_in(150.0, 1000) == 500  # capped at half the chain
    assert dg.burn_in(150.0, 1001) == 500
    assert dg.burn_in(math.nan, 1000) == 500
    assert dg.burn_in(math.inf, 999) == 499
    assert dg.burn_in(3.0, 0) == 0
    assert isinstance(dg.burn_in(10.0, 1000), int)
    with pytest.raises(ValueError):
        dg.burn_in(10.0, -1)
    with pytest.raises(ValueError):
        dg.burn_in(10.0, 100, factor=0.0)


# --------------------------------------------------------------------------- all_diagnostics


@pytest.fixture(scope="module")
def ensembles():
    """(steps, ensembles, walkers, params) = (1500, 4, 16, 2).

    Parameter "a": independent AR(1) walkers (ρ = 0.8). Parameter "b": the same, plus an
    offset shared by all walkers of an ensemble (walkers correlated within an ensemble).
    """
    rng = np.random.default_rng(17)
    steps, n_ens, n_walk = 1500, 4, 16
    a = ar1(rng, 0.8, n_ens * n_walk, steps).T.reshape(steps, n_ens, n_walk)
    b = ar1(rng, 0.8, n_ens * n_walk, steps).T.reshape(steps, n_ens, n_walk)
    b = b + np.array([0.0, 0.0, 0.0, 2.0])[None, :, None]
    return np.stack([a, b], axis=-1)


def test_all_diagnostics_follows_documented_layout(ensembles):
    steps, n_ens, n_walk, _ = ensembles.shape
    out = dg.all_diagnostics(ensembles, ["a", "b"])
    assert set(out) == {"a", "b"}
    for p, name in enumerate(["a", "b"]):
        assert set(out[name]) == {"rhat", "ess_bulk", "ess_tail", "tau"}
        values = ensembles[..., p]
        # chains for R̂ = ensembles, each flattened step-major (steps × walkers)
        per_ensemble = np.stack([values[:, e, :].ravel() for e in range(n_ens)])
        # chains for ESS and τ = every walker's trajectory
        per_walker = np.stack([values[:, e, w] for e in range(n_ens) for w in range(n_walk)])
        # Reference: ArviZ 0.23 rank R̂ / bulk ESS / tail ESS on those layouts
        rhat_ref = float(az.rhat(per_ensemble, method="rank"))
        bulk_ref = float(az.ess(per_walker, method="bulk"))
        tail_ref = float(az.ess(per_walker, method="tail"))
        assert out[name]["rhat"] == pytest.approx(rhat_ref, rel=REL_ARVIZ)
        assert out[name]["ess_bulk"] == pytest.approx(bulk_ref, rel=REL_ARVIZ)
        assert out[name]["ess_tail"] == pytest.approx(tail_ref, rel=REL_ARVIZ)
        # Reference: emcee.autocorr.integrated_time on emcee's own (steps, walkers) layout
        layout = values.reshape(steps, n_ens * n_walk)
        reference = emcee.autocorr.integrated_time(layout, tol=0)[0]
        assert out[name]["tau"] == pytest.approx(reference, rel=REL_EMCEE)


def test_between_ensemble_rhat_guards_correlated_walkers(ensembles):
    out = dg.all_diagnostics(ensembles, ["a", "b"])
    assert out["a"]["rhat"] < 1.01  # Vehtari et al. 2021 threshold
    # walkers sharing an ensemble offset look fine walker by walker, but R̂ across ensembles fails
    assert out["b"]["rhat"] > 1.2
    # analytic AR(1) τ = (1+ρ)/(1−ρ) = 9 for ρ = 0.8 (textbook fact, Sokal 1997). Loose: with
    # only 1500 steps ≈ 170 τ the windowed estimate scatters and runs low by up to ~11%
    # across seeds.
    assert out["a"]["tau"] == pytest.approx(9.0, rel=0.25)


def test_all_diagnostics_rejects_bad_shapes(ensembles):
    with pytest.raises(ValueError):
        dg.all_diagnostics(ensembles, ["a"])
    with pytest.raises(ValueError):
        dg.all_diagnostics(ensembles, ["a", "a"])
    with pytest.raises(ValueError):
        dg.all_diagnostics(ensembles[..., 0], ["a"])


@pytest.mark.parametrize("n", [2, 4, 5, 7])
def test_very_short_chains_give_nan_not_an_error(n):
    # Fewer than 4 draws per split half leave no autocorrelation pair (Vehtari et al. 2021, §3.2):
    # ESS is undefined and must come back as nan rather than raising.
    x = np.random.default_rng(n).normal(size=(2, n))
    assert math.isnan(dg.ess_bulk(x))
    assert math.isnan(dg.ess_tail(x))
