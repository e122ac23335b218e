"""The one burn-in rule and the τ-multiple rule (infer.analysis.burnin).

References: the AR(1) integrated autocorrelation time τ = (1 + ρ)/(1 − ρ) (textbook; Sokal 1997,
lecture notes, from memory); a few τ of burn-in and the 50 τ rule for trusting τ are common practice
for ensemble samplers (Foreman-Mackey et al. 2013, PASP 125, 306).
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from infer.analysis import burnin, diagnostics
from infer.analysis.samples import Samples


def _ar1(rng, rho, shape):
    eps = rng.standard_normal(shape)
    x, _ = signal.lfilter([math.sqrt(1 - rho**2)], [1.0, -rho], eps, axis=0,
                         zi=rho * rng.standard_normal((1,) + shape[1:]))
    return x


def test_tau_multiple_rule():
    assert burnin.tau_trusted(1001, 20.0, 50) and not burnin.tau_trusted(1000, 20.0, 50)
    assert not burnin.tau_trusted(10**9, math.nan, 50) and not burnin.tau_trusted(10**9, math.inf, 50)


def test_burn_in_follows_the_slowest_quantity_sampled_or_derived():
    # a derived quantity that mixes slower than every sampled one sets the burn-in
    rng = np.random.default_rng(4)
    steps = 3000
    fast = _ar1(rng, 0.5, (steps, 2, 16, 1))                       # τ = 3
    slow = _ar1(rng, 0.9, (steps, 2, 16, 1))                       # τ = 19
    lp = np.zeros((steps, 2, 16))
    s = Samples(("x",), ("y",), fast, slow, lp, lp)
    b = burnin.choose(s)
    tau_slow = diagnostics.autocorr_time(slow[..., 0].reshape(steps, -1).T)
    assert tau_slow == pytest.approx(19, rel=0.2)                 # AR(1) closed form
    assert b.tau_max == tau_slow and b.burn == math.ceil(burnin.BURN_FACTOR * tau_slow)
    assert b.trusted and "automatic: 5 × τ_max" in b.rule() and not b.capped
    given = burnin.choose(s, 7, source="set with --burn")
    assert given.burn == 7 and given.rule() == "set with --burn" and math.isnan(given.tau_max)


def test_long_runs_are_thinned_and_tau_rescaled():
    rng = np.random.default_rng(5)
    steps = 9000                                                  # thinned by 2 to 4500 steps
    x = _ar1(rng, 0.95, (steps, 1, 8, 1))                          # τ = 39
    lp = np.zeros((steps, 1, 8))
    s = Samples(("x",), (), x, np.zeros((steps, 1, 8, 0)), lp, lp)
    t = burnin.choose(s).tau_max
    assert t == 2 * diagnostics.autocorr_time(x[::2, ..., 0].reshape(-1, 8).T)
    assert t == pytest.approx(39, rel=0.25)


def test_short_run_rule_says_the_burn_in_is_provisional():
    rng = np.random.default_rng(6)
    x = _ar1(rng, 14 / 15, (16, 2, 16, 1))                          # τ = 29 ≫ 16 steps
    lp = np.zeros((16, 2, 16))
    b = burnin.choose(Samples(("x",), (), x, np.zeros((16, 2, 16, 0)), lp, lp))
    assert not b.trusted and "not yet measurable" in b.rule() and b.burn <= 8
