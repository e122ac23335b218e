"""The surrogate engine (infer.sampling.engine) against posteriors computed independently.

References: numerical quadrature on a fine grid (scipy.integrate.trapezoid) for a non-linear two-parameter
model; the closed-form evidence of a linear-Gaussian model (Gelman et al. 2013, Bayesian Data Analysis,
3rd ed., §14.2; the evidence of a Gaussian likelihood with a flat prior on a box that holds the whole
posterior is (2π)^{P/2}|Σ_post|^{1/2} L_max / V_prior). Monte Carlo errors from the weight ESS.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, optimize

from infer.sampling.engine import Engine, EngineSettings, Laplace
from infer.sampling.exactlog import ExactLog, MemoryLog
from infer.sampling.surrogate_chain import sample_surrogate

T = np.linspace(0.0, 2.0, 16)
SIGMA = 0.05
LO, HI = np.array([0.2, 0.2]), np.array([3.0, 3.0])


def model(theta):
    theta = np.atleast_2d(theta)
    a, b = theta[:, :1], theta[:, 1:2]
    return a * np.exp(-b * T) + 0.4 * a * b * T ** 2 / (1 + b)


Y = model([1.2, 0.8])[0] + SIGMA * np.random.default_rng(3).standard_normal(len(T))


def log_post_from_model(theta, f):
    theta = np.atleast_2d(theta)
    inside = np.all((theta > LO) & (theta < HI), axis=1)
    chi2 = np.sum(((Y - f) / SIGMA) ** 2, axis=1)
    return np.where(inside, -0.5 * chi2 - np.log(np.prod(HI - LO)) - len(T) * math.log(SIGMA * math.sqrt(2 * math.pi)),
                    -np.inf)


class CountingEvaluator:
    """The exact posterior as an evaluator: blob = model vector (the surrogate's training targets)."""

    def __init__(self):
        self.calls = 0
        self.failures = []

    def evaluate(self, points):
        points = np.asarray(points, float)
        self.calls += len(points)
        f = model(points)
        lp = log_post_from_model(points, f)
        reasons = [None if np.isfinite(v) else "outside-prior" for v in lp]
        return lp, f, reasons


class ToyProblem:
    names = ("a", "b")
    lower, upper = LO, HI

    def __init__(self, bias=0.0, degree=3):
        self.bias, self.degree = bias, degree

    def best_fit(self, evaluate):
        f = lambda x: -evaluate(np.array([x]))[0][0]
        res = optimize.minimize(f, [1.0, 1.0], method="Nelder-Mead", options={"xatol": 1e-6, "fatol": 1e-8})
        h = 1e-3
        x0 = res.x
        pts = [x0 + h * (e1 + e2) for e1 in (np.eye(2)[0], -np.eye(2)[0], np.zeros(2)) for e2 in
               (np.eye(2)[1], -np.eye(2)[1], np.zeros(2))]
        lp = evaluate(np.array(pts))[0].reshape(3, 3)
        H = np.empty((2, 2))
        H[0, 0] = (lp[0, 2] - 2 * lp[2, 2] + lp[1, 2]) / h ** 2
        H[1, 1] = (lp[2, 0] - 2 * lp[2, 2] + lp[2, 1]) / h ** 2
        H[0, 1] = H[1, 0] = (lp[0, 0] - lp[0, 1] - lp[1, 0] + lp[1, 1]) / (4 * h ** 2)
        return Laplace(x0, np.linalg.inv(-H))

    def targets(self, X, blobs):
        return blobs

    def train(self, X, Y_, laplace):
        z = (X - laplace.mean) / np.sqrt(np.diag(laplace.cov))

        def features(zz):
            cols = [np.ones(len(zz))]
            for i in range(self.degree + 1):
                for j in range(self.degree + 1 - i):
                    if i + j:
                        cols.append(zz[:, 0] ** i * zz[:, 1] ** j)
            return np.stack(cols, axis=1)
        coef, *_ = np.linalg.lstsq(features(z), Y_, rcond=None)
        sd, mean, bias = np.sqrt(np.diag(laplace.cov)), laplace.mean, self.bias

        def logpost(x):
            x = np.atleast_2d(x)
            f = features((x - mean) / sd) @ coef + bias
            return log_post_from_model(x, f)
        return logpost, {}


def chain_sampler(logpost, laplace, seed, need):
    return sample_surrogate(logpost, laplace, seed, need, lower=LO, upper=HI, check_every=200)


def quadrature():
    a = np.linspace(LO[0], HI[0], 700)
    b = np.linspace(LO[1], HI[1], 700)
    A, B = np.meshgrid(a, b, indexing="ij")
    pts = np.stack([A.ravel(), B.ravel()], axis=1)
    lp = log_post_from_model(pts, model(pts)).reshape(A.shape)
    m = lp.max()
    p = np.exp(lp - m)
    z = integrate.trapezoid(integrate.trapezoid(p, b, axis=1), a)
    pa = integrate.trapezoid(p, b, axis=1) / z
    pb = integrate.trapezoid(p, a, axis=0) / z
    out = {}
    for name, grid, dens in (("a", a, pa), ("b", b, pb)):
        mean = integrate.trapezoid(grid * dens, grid)
        sd = math.sqrt(integrate.trapezoid((grid - mean) ** 2 * dens, grid))
        out[name] = (mean, sd)
    return out, m + math.log(z)


def run(problem, ess=600, **kw):
    ev = CountingEvaluator()
    settings = EngineSettings(round_size=200, evidence_draws=20000, **kw)
    log = ExactLog(ev, MemoryLog(2, len(T)), batch=16)
    return Engine(problem, log, settings, ess, seed=5, chain_sampler=chain_sampler).run(), ev


def weighted(x, w):
    m = np.sum(w * x) / np.sum(w)
    return m, math.sqrt(np.sum(w * (x - m) ** 2) / np.sum(w))


def test_engine_matches_quadrature_and_evidence():
    res, ev = run(ToyProblem())
    ref, ln_z = quadrature()
    assert res.converged, res.missing
    assert res.khat < 0.7
    assert res.exact_calls == ev.calls          # every call went through the log
    w = res.weights
    for i, name in enumerate(("a", "b")):
        mean, sd = weighted(res.position[:, i], w)
        mref, sref = ref[name]
        mc = sref / math.sqrt(res.ess)          # Monte Carlo error of a weighted mean
        assert abs(mean - mref) < 4 * mc, (name, mean, mref, mc)
        assert abs(sd / sref - 1) < 4 / math.sqrt(2 * res.ess) + 0.01, (name, sd, sref)
    assert abs(res.ln_z - ln_z) < 4 * res.ln_z_err + 0.01, (res.ln_z, ln_z, res.ln_z_err)


def test_biased_surrogate_is_caught_and_never_called_converged():
    # A surrogate whose model vector is off by 2 σ in every band: its posterior is far from the exact one.
    res, _ = run(ToyProblem(bias=2 * SIGMA), max_refits=1)
    assert not res.converged
    assert res.missing
    assert max(r.khat for r in res.rounds) > 0.7 or min(r.ess / r.n for r in res.rounds) < 0.5


def test_resume_from_a_partial_log_is_identical():
    full, ev_full = run(ToyProblem())
    # A session killed after 100 exact calls: replay them, compute the rest.
    ev = CountingEvaluator()
    backend = MemoryLog(2, len(T))
    part = ExactLog(ev, backend, batch=16)
    rows = None
    try:
        class Stop(Exception):
            pass

        def stop_at(calls):
            if calls >= 96:
                raise Stop
        part.on_batch = stop_at
        Engine(ToyProblem(), part, EngineSettings(round_size=200, evidence_draws=20000), 600, seed=5,
               chain_sampler=chain_sampler).run()
    except Stop:
        rows = backend.rows()
    assert rows is not None and len(rows) == 96
    ev2 = CountingEvaluator()
    again = Engine(ToyProblem(), ExactLog(ev2, backend, batch=16), EngineSettings(round_size=200,
                   evidence_draws=20000), 600, seed=5, chain_sampler=chain_sampler).run()
    assert ev2.calls == ev_full.calls - 96
    np.testing.assert_array_equal(again.position, full.position)
    np.testing.assert_array_equal(again.log_weight, full.log_weight)
    assert again.ln_z == full.ln_z


def test_surrogate_chain_is_the_plain_driver_and_samples_a_gaussian():
    # Reference: the exact mean and covariance of a correlated 4-D Gaussian (closed form). The surrogate
    # chain runs the plain run's Driver (in memory); its thinned pool must reproduce them.
    from infer.sampling import driver as driver_module
    P = 4
    rng = np.random.default_rng(3)
    a = rng.standard_normal((P, P))
    cov = a @ a.T + P * np.eye(P)
    prec = np.linalg.inv(cov)
    mean = np.arange(P, dtype=float)

    def logpost(x):
        d = np.atleast_2d(x) - mean
        return -0.5 * np.einsum("ij,jk,ik->i", d, prec, d)
    runs = []
    real = driver_module.Driver

    class Counting(real):
        def run(self, *args, **kw):
            runs.append(1)
            return super().run(*args, **kw)
    driver_module.Driver = Counting
    try:
        pool, verdict = sample_surrogate(logpost, Laplace(mean + 0.3, 1.3 * cov), 5, 1500,
                                         lower=mean - 1e3, upper=mean + 1e3)
    finally:
        driver_module.Driver = real
    assert runs, "the surrogate chain did not go through the driver"
    assert verdict["met"] and verdict["rhat_max"] < 1.01 and len(pool) >= 1500, verdict
    n_eff = len(pool)                                  # thinned by ⌈τ⌉: nearly independent draws
    sd = np.sqrt(np.diag(cov))
    assert np.all(np.abs(pool.mean(0) - mean) < 4 * sd / math.sqrt(n_eff / 2)), pool.mean(0)
    ratio = pool.std(0) / sd
    assert np.all(np.abs(ratio - 1) < 4 / math.sqrt(n_eff)), ratio


def test_surrogate_chain_pauses_on_the_callers_flag():
    from infer.parallel import Interrupted
    calls = []

    def stop():
        calls.append(1)
        return len(calls) > 50
    with pytest.raises(Interrupted):
        sample_surrogate(lambda x: -0.5 * np.sum(np.atleast_2d(x) ** 2, axis=1), Laplace(np.zeros(2), np.eye(2)),
                         1, 500, lower=-np.ones(2) * 50, upper=np.ones(2) * 50, should_stop=stop)
