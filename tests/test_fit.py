"""The best fit (infer.fit): against closed forms, an independent optimiser and the command line.

References beside each check:
* linear-Gaussian model: MAP under flat priors is the generalised-least-squares estimate
  (AᵀC⁻¹A)⁻¹AᵀC⁻¹d with covariance (AᵀC⁻¹A)⁻¹, and a Gaussian prior adds its precision (Gelman et al. 2013,
  *Bayesian Data Analysis*, 3rd ed., §14.2);
* −2 ln L against scipy.stats.multivariate_normal, PTE against scipy.stats.chi2;
* a non-linear problem against scipy.optimize.minimize with tight tolerances.
"""
from __future__ import annotations

import json
import math
import pickle
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import optimize, stats

from infer import config
from infer import data as datasets
from infer.fit import BandModelFactory, FitResult, Options, fit, minimize
from infer.fit.bestfit import SUFFIX, default_path
from infer.theory.templates import NAMES, TemplateTheory

from conftest import quick_config_text

ROOT = Path(__file__).resolve().parent.parent


def _linear(data_path):
    data = datasets.load(data_path)
    A = TemplateTheory(data.ell_max_needed, {}).design_matrix(data.kind, data.window_ell, data.window)
    return data, A, np.linalg.inv(data.covariance)


def _gls(A, cinv, d, prior_prec=None, prior_mean=None):
    F = A.T @ cinv @ A
    b = A.T @ cinv @ d
    if prior_prec is not None:
        F = F + np.diag(prior_prec)
        b = b + prior_prec * prior_mean
    cov = np.linalg.inv(F)
    return cov @ b, cov


class Counting:
    """An evaluator wrapper that records the size of every batch."""

    def __init__(self, inner):
        self.inner, self.batches = inner, []

    def evaluate(self, points):
        self.batches.append(len(points))
        return self.inner.evaluate(points)

    def close(self):
        pass


def test_map_with_flat_priors_is_the_gls_estimate(write_config, quick_data):
    path, _ = write_config()
    cfg = config.load(path)
    from infer.parallel import InProcess
    ev = Counting(InProcess(BandModelFactory(cfg)()))
    res = fit(cfg, starts=3, evaluator=ev)
    data, A, cinv = _linear(quick_data)
    mean, cov = _gls(A, cinv, data.value)                                    # BDA §14.2
    best = np.array([res.best[n] for n in NAMES])
    assert res.converged
    np.testing.assert_allclose(best, mean, rtol=1e-6)
    np.testing.assert_allclose(np.array(res.covariance), cov, rtol=1e-6)
    np.testing.assert_allclose([res.sigma[n] for n in NAMES], np.sqrt(np.diag(cov)), rtol=1e-6)
    resid = data.value - A @ mean
    chi2 = float(resid @ cinv @ resid)
    assert res.chi2 == pytest.approx(chi2, rel=1e-9)
    assert res.dof == len(data.value) - 4
    assert res.pte == pytest.approx(stats.chi2.sf(chi2, len(data.value) - 4), rel=1e-9)   # scipy.stats
    lnl = stats.multivariate_normal(A @ mean, data.covariance).logpdf(data.value)      # scipy.stats
    assert res.neg2_log_like == pytest.approx(-2 * lnl, rel=1e-9)
    for kind, d in res.per_spectrum.items():
        rows = data.kind == kind
        r = resid[rows]
        assert d["chi2"] == pytest.approx(float(r @ np.linalg.solve(data.covariance[np.ix_(rows, rows)], r)), rel=1e-8)
        assert d["n_bands"] == rows.sum()
    assert res.derived["a_sum"] == pytest.approx(mean.sum(), rel=1e-9)
    # Every exact call is counted, and the Jacobian's 2P points went into one evaluator call.
    assert res.calls == sum(ev.batches)
    assert 2 * 4 in ev.batches
    assert res.calls <= 3 + 8 + 3 + 8


def test_gaussian_prior_adds_its_precision_and_likelihood_mode_drops_it(write_config, quick_data):
    priors = {n: "{ uniform = [0.0, 3.0] }" for n in NAMES}
    priors["a_2"] = "{ normal = [0.95, 0.01] }"
    path, _ = write_config(priors=priors)
    cfg = config.load(path)
    data, A, cinv = _linear(quick_data)
    prec = np.array([0.0, 1 / 0.01 ** 2, 0.0, 0.0])
    mean, cov = _gls(A, cinv, data.value, prec, np.array([0.0, 0.95, 0.0, 0.0]))   # BDA §14.2
    res = fit(cfg, starts=2, workers=0)
    np.testing.assert_allclose([res.best[n] for n in NAMES], mean, rtol=1e-6)
    np.testing.assert_allclose(np.array(res.covariance), cov, rtol=1e-6)
    assert res.chi2_prior == pytest.approx(((mean[1] - 0.95) / 0.01) ** 2, rel=1e-6)
    mle = fit(cfg, starts=2, mode="likelihood", workers=0)
    gls, gcov = _gls(A, cinv, data.value)
    np.testing.assert_allclose([mle.best[n] for n in NAMES], gls, rtol=1e-6)
    np.testing.assert_allclose(np.array(mle.covariance), gcov, rtol=1e-6)
    assert mle.chi2_prior == 0 and mle.log_post is None and mle.mode == "likelihood"


def test_optimum_on_a_prior_bound_is_reported(tmp_path, quick_data):
    data, A, cinv = _linear(quick_data)
    gls, gcov = _gls(A, cinv, data.value)
    edge = round(float(gls[0] - 1.5 * math.sqrt(gcov[0, 0])), 4)           # the free optimum lies above it
    priors = {n: "{ uniform = [0.0, 3.0] }" for n in NAMES}
    priors["a_1"] = f"{{ uniform = [0.0, {edge}] }}"
    text = quick_config_text(quick_data, tmp_path / "edge.h5", priors=priors)
    path = tmp_path / "edge.toml"
    path.write_text(text.replace("guess = 1.0", f"guess = {edge - 0.05}", 1))          # a_1 comes first
    cfg = config.load(path)
    res = fit(cfg, starts=3, workers=0)
    # Closed form: a_1 at the bound, the others their conditional GLS estimate given it.
    rest, _ = _gls(A[:, 1:], cinv, data.value - A[:, 0] * edge)
    assert res.at_bound == {"a_1": "upper"}
    assert res.best["a_1"] == pytest.approx(edge, abs=1e-8)
    np.testing.assert_allclose([res.best[n] for n in NAMES[1:]], rest, rtol=1e-6)
    assert res.converged and "prior bound" in res.laplace_note


def _exp_problem():
    """y = a e^{−b t} fitted to data that are not of that form (large residuals): plain Gauss–Newton
    diverges from (a, b) = (1, 4)."""
    t = np.linspace(0, 4, 30)
    rng = np.random.default_rng(3)
    sig = 0.05
    y = 2.0 * np.exp(-1.3 * t) + 0.3 * np.sin(3 * t) + sig * rng.standard_normal(t.size)

    def res(x):
        return (y - x[0] * np.exp(-x[1] * t)) / sig
    return res


def test_damping_converges_where_gauss_newton_diverges():
    res = _exp_problem()
    x0 = np.array([1.0, 4.0])
    # Undamped Gauss–Newton: the first step raises χ² by orders of magnitude and it ends far off.
    x, c2 = x0.copy(), [float(res(x0) @ res(x0))]
    for _ in range(10):
        J = np.array([(res(x + 1e-6 * e) - res(x - 1e-6 * e)) / 2e-6 for e in np.eye(2)]).T
        x = x - np.linalg.lstsq(J, res(x), rcond=None)[0]
        c2.append(float(res(x) @ res(x)))
    assert c2[1] > 100 * c2[0]
    ref = optimize.minimize(lambda z: float(res(z) @ res(z)), x0, method="Nelder-Mead",        # scipy
                            options={"xatol": 1e-12, "fatol": 1e-12, "maxiter": 20000})
    assert c2[-1] > ref.fun + 100
    out = minimize(lambda P: np.array([res(p) for p in P]), x0[None, :], [-np.inf, 0.0], [np.inf, 50.0],
                   Options(fd_step=1e-4, chi2_tol=1e-12))
    assert out.converged
    np.testing.assert_allclose(out.u, ref.x, rtol=1e-6)
    assert out.chi2 == pytest.approx(ref.fun, rel=1e-10)
    assert out.calls < 80


def test_several_starts_find_the_lower_of_two_optima():
    # r = (x² − 1, 0.3 (x − 0.2)) in one dimension: minima near x = ±1, the one at +1 lower.
    def fun(P):
        return np.array([[p[0] ** 2 - 1, 0.3 * (p[0] - 0.2)] for p in P])
    ref = optimize.minimize_scalar(lambda x: (x ** 2 - 1) ** 2 + 0.09 * (x - 0.2) ** 2, bounds=(0, 3),
                                   method="bounded", options={"xatol": 1e-12})
    out = minimize(fun, np.array([[-1.2], [1.5]]), [-5.0], [5.0], Options(fd_step=1e-4, chi2_tol=1e-14))
    assert out.u[0] == pytest.approx(ref.x, rel=1e-6)
    one = minimize(fun, np.array([[-1.2]]), [-5.0], [5.0], Options(fd_step=1e-4, chi2_tol=1e-14))
    assert one.u[0] < 0 and one.chi2 > out.chi2


def test_factory_is_picklable_and_pool_gives_the_same_fit(write_config):
    path, _ = write_config()
    cfg = config.load(path)
    built = pickle.loads(pickle.dumps(BandModelFactory(cfg)))()
    assert len(built.blob_names) == built.n_bands + len(built.derived_names)
    assert pickle.loads(pickle.dumps(BandModelFactory(cfg))) == BandModelFactory(cfg)       # MPI ranks keep it
    serial = fit(cfg, starts=2, workers=0)
    pooled = fit(cfg, starts=2, workers=2)
    assert serial.best == pooled.best and serial.calls == pooled.calls


def _cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "infer", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, timeout=300)


@pytest.mark.slow
def test_command_writes_the_result_and_refuses_bad_options(write_config, tmp_path):
    # A theory that kills its own process at any call: a bad option must be refused before one.
    poisoned, _ = write_config("poisoned.toml",
                               theory_extra='fault = { parameter = "a_1", above = -10.0, action = "exit" }')
    for bad in (["--starts", "0"], ["--starts", "-2"], ["--out", tmp_path / "x.txt"], ["--workers", "-1"]):
        p = _cli("fit", poisoned, *bad)
        assert p.returncode == 2, (bad, p.stderr)
        lines = p.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("infer: error:"), p.stderr
    keep = tmp_path / "keep.json"
    keep.write_text('{"mine": 1}')
    p = _cli("fit", poisoned, "--out", keep, "--replace")
    assert p.returncode == 2 and keep.read_text() == '{"mine": 1}'
    path, chain = write_config()
    p = _cli("fit", path)
    assert p.returncode == 0, p.stderr
    out = Path(str(chain)[:-3] + SUFFIX["posterior"])
    assert default_path(config.load(path), "posterior") == out
    doc = json.loads(out.read_text())
    assert doc["format"] == "infer-fit" and doc["converged"] and set(doc["best"]) == set(NAMES)
    for n in NAMES:
        assert n in p.stdout
    assert "TT" in p.stdout and "PTE" in p.stdout
    assert _cli("fit", path).returncode == 2                                 # exists: not replaced silently
    p = _cli("fit", path, "--likelihood", "--starts", "1", "--out", tmp_path / "mle.json")
    assert p.returncode == 0 and json.loads((tmp_path / "mle.json").read_text())["mode"] == "likelihood"
    assert _cli("fit", path, "--replace").returncode == 0


def test_result_round_trips_to_json(write_config):
    path, _ = write_config()
    res = fit(config.load(path), starts=1, workers=0)
    doc = json.loads(json.dumps(res.to_dict(), allow_nan=False))
    assert doc["format_version"] == 1 and isinstance(res, FitResult)
    assert np.allclose(doc["correlation"], np.array(res.correlation))


@pytest.mark.camb
def test_demo_converges_within_fifty_calls():
    cfg = config.load(ROOT / "configs" / "kestrel_demo.toml")
    res = fit(cfg, starts=3, workers=cfg.sampling.workers)
    print(f"\ndemo best fit: {res.calls} exact calls, {res.iterations} iterations, χ² {res.chi2:.2f} "
          f"for {res.dof} dof ({res.reason})")
    assert res.converged and res.calls <= 50
    assert not res.at_bound
    model = BandModelFactory(cfg)()
    _, blob, _ = model(np.array([p.guess for p in cfg.sampled]))          # one more CAMB call
    assert res.chi2 < model.like.chi2(blob[:model.n_bands])
    # The Gauss–Newton curvature is the data's Fisher matrix plus the prior precision, so the Laplace σ of
    # the calibration cannot exceed its prior σ (0.0025).
    assert 0 < res.sigma["calibration"] <= 0.0025 * (1 + 1e-9)
    assert all(0 < v < math.inf for v in res.sigma.values())


def test_an_unconverged_fit_says_so_and_still_reports_a_finite_difference_curvature(write_config, quick_data):
    path, _ = write_config()
    cfg = config.load(path)
    from infer.parallel import InProcess
    ev = Counting(InProcess(BandModelFactory(cfg)()))
    res = fit(cfg, starts=1, evaluator=ev, options=Options(chi2_tol=0.0, max_iterations=1))
    assert not res.converged and "iterations" in res.reason
    assert res.calls == sum(ev.batches) and ev.batches[-1] == 2 * 4        # the curvature's own stencil
    data, A, cinv = _linear(quick_data)
    _, cov = _gls(A, cinv, data.value)
    np.testing.assert_allclose(np.array(res.covariance), cov, rtol=1e-6)   # linear: exact at any point


@pytest.mark.camb
def test_demo_with_tau_and_foreground_free_reports_the_bounds(tmp_path):
    # The non-Gaussian case of issue 9: τ under a uniform prior and the TT foreground amplitude ≥ 0
    # (the mock has no foreground, so its optimum is on the edge). Measured: both end on their lower
    # bounds after 38 exact calls.
    text = (ROOT / "configs" / "kestrel_demo.toml").read_text()
    text = text.replace('file = "data/', f'file = "{ROOT}/configs/data/')
    text = text.replace("value = 0.055", "prior = { uniform = [0.01, 0.8] }\nguess = 0.055\nspread = 0.008\n\n"
                        "[parameters.fg_tt_amp]\nprior = { uniform = [0.0, 100.0] }\nguess = 2.0\nspread = 1.0")
    text = text.replace("walkers = 12", "walkers = 16").replace('"../chains/', f'"{tmp_path}/')
    path = tmp_path / "free_tau.toml"
    path.write_text(text)
    cfg = config.load(path)
    res = fit(cfg, starts=3, workers=cfg.sampling.workers)
    print(f"\nτ and foreground free: {res.calls} exact calls, at bound {res.at_bound}, χ² {res.chi2:.2f}")
    assert res.converged and res.calls <= 60
    assert res.at_bound.get("fg_tt_amp") == "lower" and "prior bound" in res.laplace_note


@pytest.mark.slow
@pytest.mark.parametrize("workers", [0, 1])
def test_fit_under_mpi_equals_the_serial_fit(write_config, tmp_path, workers):
    from test_parallel import launch
    path, _ = write_config(workers=workers)
    serial = fit(config.load(path), starts=2, workers=0)
    code, _, err = launch(3, "fit", str(path), "--starts", "2", "--out", str(tmp_path / "mpi.json"))
    assert code == 0, err
    doc = json.loads((tmp_path / "mpi.json").read_text())
    assert doc["best"] == serial.best and doc["calls"] == serial.calls
