"""Tests of ``infer forecast`` (infer.forecast.forecast, infer.commands.forecast, figures.ellipses).

External references:
* The Fisher matrix F = ∂mᵀC⁻¹∂m of a Gaussian likelihood with a parameter-independent covariance
  (Tegmark, Taylor & Heavens 1997, ApJ 480, 22) and the closed-form posterior of the linear-Gaussian
  model, Σ = (AᵀC⁻¹A + Σ_prior⁻¹)⁻¹ (Gelman et al. 2013, *Bayesian Data Analysis*, 3rd ed., §14.2): for the
  template model (linear in its amplitudes) the Fisher errors ARE the posterior sds, to rounding.
* An independent implementation of the log-posterior's curvature: the Hessian of
  ``scipy.stats.multivariate_normal.logpdf`` plus ``scipy.stats.norm.logpdf`` priors.
* The 2-D Gaussian confidence regions: Δχ² quantiles of ``scipy.stats.chi2`` with 2 dof.
* A mock fit from the same spec (quick experiment, sampled by emcee): Fisher σ within 10 % of the
  posterior sds — for a linear model they agree up to the chain's Monte Carlo error, ≈ 1/√(2 ESS).
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from infer import config
from infer.cli import main
from infer.commands.forecast import check_output
from infer.forecast import forecast as fc
from infer.forecast.experiment import read_experiment
from infer.forecast.knox import knox_covariance
from infer.report.figures import render
from infer.report.figures.ellipses import MASSES, ellipse, ellipses_figure
from infer.theory.templates import NAMES, TemplateTheory

from conftest import gaussian_loglike_hessian

REPO = Path(__file__).resolve().parents[1]
SPEC = REPO / "configs" / "quick_experiment.toml"
A4_PRIOR_SD = 0.02          # comparable to the data's error on a_4, so the prior visibly matters


def run_file(tmp_path: Path, data: str = "unused.h5", *, a4_prior=f"{{ normal = [1.0, {A4_PRIOR_SD}] }}",
             a4_guess: float = 1.0, extra_param: str = "", chain: str | None = None, text: str | None = None) -> Path:
    """A run file of the template model (a_1…a_3 flat, a_4 with a normal prior)."""
    params = "".join(f"[parameters.{n}]\nprior = {{ uniform = [0.0, 3.0] }}\nguess = 1.0\nspread = 0.1\n\n"
                     for n in NAMES[:3])
    params += f"[parameters.a_4]\nprior = {a4_prior}\nguess = {a4_guess}\nspread = 0.1\n\n" + extra_param
    body = text or (f'[run]\nname = "fc"\nseed = 1\n\n[dataset]\nfile = "{data}"\n\n[theory]\ncode = "templates"\n\n'
                    f"{params}[sampling]\nworkers = 0\n\n[output]\nchain = \"{chain or tmp_path / 'c.h5'}\"\n")
    path = tmp_path / "run.toml"
    path.write_text(body)
    return path


@pytest.fixture
def spec(tmp_path) -> Path:
    path = tmp_path / "spec.toml"
    shutil.copy(SPEC, path)
    return path


def closed_form(spec_path: Path, prior_sd4: float):
    """Σ = (AᵀC⁻¹A + Σ_prior⁻¹)⁻¹ of the template model for the spec's bands (Gelman et al. 2013 §14.2)."""
    exp, fid, _ = read_experiment(spec_path)
    theory = TemplateTheory(exp.ell_max + 2, {})
    bands = knox_covariance(exp, theory.compute(fid))
    lo, hi = bands.ell_lo, bands.ell_hi
    ell = np.arange(int(lo.min()), int(hi.max()) + 1)
    window = ((ell[None, :] >= lo[:, None]) & (ell[None, :] <= hi[:, None])) / (hi - lo + 1)[:, None]
    A = theory.design_matrix(bands.kind, ell, window)
    prior = np.diag([0.0, 0.0, 0.0, 1.0 / prior_sd4**2])
    return np.linalg.inv(A.T @ np.linalg.solve(bands.covariance, A) + prior), A, bands.covariance


def test_linear_model_fisher_errors_are_the_closed_form_posterior_sds(tmp_path, spec):
    # Linear model, Gaussian likelihood and priors: the Fisher matrix plus prior precision is the exact
    # posterior precision (Tegmark, Taylor & Heavens 1997; Gelman et al. 2013 §14.2).
    cfg = config.load(run_file(tmp_path))
    result = fc.forecast(fc.prepare(spec, cfg), interactive=False)
    exact, A, cov = closed_form(spec, A4_PRIOR_SD)
    np.testing.assert_allclose(result.sigma, np.sqrt(np.diag(exact)), rtol=1e-9)
    np.testing.assert_allclose(result.conditional, 1.0 / np.sqrt(np.diag(np.linalg.inv(exact))), rtol=1e-9)
    np.testing.assert_allclose(result.correlation, exact / np.sqrt(np.outer(np.diag(exact), np.diag(exact))),
                               atol=1e-9)
    # The same precision as the curvature of scipy's Gaussian log-densities (independent code).
    hess = gaussian_loglike_hessian(A @ np.ones(4), A, cov, np.ones(4), h=0.05)
    hess[3, 3] += (stats.norm.logpdf(1.05, 1.0, A4_PRIOR_SD) - 2 * stats.norm.logpdf(1.0, 1.0, A4_PRIOR_SD)
                   + stats.norm.logpdf(0.95, 1.0, A4_PRIOR_SD)) / 0.05**2
    np.testing.assert_allclose(result.matrix, -hess, rtol=1e-6)
    assert result.prior_precision[3] == pytest.approx(1 / A4_PRIOR_SD**2) and not result.prior_precision[:3].any()
    assert result.fisher.all_converged and result.chi2_fiducial < 1e-20
    assert result.calls == 1 + 2 * 4 * 2                # the fiducial point, one stencil at h and at h/2


def test_fixed_parameter_is_held_and_normal_prior_enters(tmp_path, spec):
    # a_4 fixed: the forecast is the closed form of the 3 free amplitudes with a_4 known.
    cfg = config.load(_fixed_a4(tmp_path))
    result = fc.forecast(fc.prepare(spec, cfg), interactive=False)
    exact, A, cov = closed_form(spec, 1.0)
    f3 = A[:, :3].T @ np.linalg.solve(cov, A[:, :3])
    assert result.names == NAMES[:3] and result.fixed == {"a_4": 1.0}
    np.testing.assert_allclose(result.sigma, np.sqrt(np.diag(np.linalg.inv(f3))), rtol=1e-9)


def _fixed_a4(tmp_path):
    path = run_file(tmp_path)
    text = path.read_text().replace(f"prior = {{ normal = [1.0, {A4_PRIOR_SD}] }}\nguess = 1.0\nspread = 0.1",
                                    "value = 1.0")
    path.write_text(text)
    return path


def test_command_prints_the_label_and_writes_table_numbers_and_figure(tmp_path, spec, capsys):
    cfg = run_file(tmp_path)
    out = tmp_path / "fc"
    assert main(["forecast", str(spec), "--config", str(cfg), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "Gaussian approximation of the posterior at the fiducial point" in text
    assert "σ (marg.)" in text and "σ (cond.)" in text and "correlation" in text
    rec = json.loads((out / "forecast.json").read_text())
    exact, _, _ = closed_form(spec, A4_PRIOR_SD)
    np.testing.assert_allclose([rec["sigma"][n] for n in NAMES], np.sqrt(np.diag(exact)), rtol=1e-9)
    md = (out / "forecast.md").read_text()
    assert md.startswith("# Fisher forecast") and "| `a_1` |" in md and "Gaussian approximation" in md
    assert (out / "ellipses.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # a second run needs --replace, which accepts an earlier forecast (and only that: test_bad_input)
    assert main(["forecast", str(spec), "--config", str(cfg), "--out", str(out)]) == 2
    assert "already exists" in capsys.readouterr().err
    assert check_output(out, replace=True) == out.resolve()


def test_ellipses_enclose_the_stated_chi2_quantiles():
    # Outline of the p-region of N(μ, Σ): (x − μ)ᵀΣ⁻¹(x − μ) = χ²₂ quantile of p (scipy.stats.chi2).
    cov = np.array([[4.0, -1.5], [-1.5, 1.0]])
    mu = np.array([1.0, -2.0])
    assert MASSES == pytest.approx((stats.norm.cdf(1) - stats.norm.cdf(-1), stats.norm.cdf(2) - stats.norm.cdf(-2)))
    for mass in MASSES:
        d = ellipse(mu, cov, mass) - mu
        q = np.einsum("ni,ij,nj->n", d, np.linalg.inv(cov), d)
        np.testing.assert_allclose(q, stats.chi2.ppf(mass, 2), rtol=1e-12)
    cov3 = np.diag([1.0, 2.0, 3.0]) + 0.5
    draws = np.random.default_rng(0).multivariate_normal([0.0, 1.0, 2.0], cov3, size=4000)

    class Draws:                       # the kept draws of a chain: anything with column(name)
        def column(self, name):
            return draws[:, "xyz".index(name)]
    plain = render(ellipses_figure(["x", "y", "z"], [0.0, 1.0, 2.0], cov3, {"x": r"\omega_b"}), dpi=50)
    over = render(ellipses_figure(["x", "y", "z"], [0.0, 1.0, 2.0], cov3, {"x": r"\omega_b"}, sample=Draws()), dpi=50)
    assert plain.shape[2] == 4 and plain[..., :3].std() > 10           # something was drawn
    assert plain.shape == over.shape and np.any(plain != over)           # and the sample over it


@pytest.mark.slow
def test_forecast_within_ten_percent_of_a_mock_posterior(tmp_path, capsys):
    # Simulate the quick experiment, sample configs/quick.toml on it (emcee, seconds), and compare
    # (brief: "forecast errors within 10 % of the mock posterior's sds").
    spec = tmp_path / "quick_experiment.toml"
    shutil.copy(SPEC, spec)
    assert main(["simulate", str(spec)]) == 0
    data = tmp_path / "data" / "quick_bandpowers.h5"
    chain = tmp_path / "quick.h5"
    text = (REPO / "configs" / "quick.toml").read_text().replace('"data/quick_bandpowers.h5"', f'"{data}"')
    cfg = tmp_path / "quick.toml"
    cfg.write_text(text + f'\n[output]\nchain = "{chain}"\n')
    assert main(["run", str(cfg)]) == 0
    capsys.readouterr()
    out = tmp_path / "fc"
    assert main(["forecast", str(spec), "--config", str(cfg), "--against", str(chain), "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "Fisher σ" in printed and "posterior sd" in printed
    against = json.loads((out / "forecast.json").read_text())["against"]
    ratio = np.array(against["ratio"])
    assert against["names"] == list(NAMES) and np.all(np.abs(ratio - 1) < 0.10), ratio
    # and the chain's Monte Carlo error explains the difference (≤ 4 MC errors)
    err = np.array(against["posterior_sd_error"]) / np.array(against["posterior_sd"])
    assert np.all(np.abs(ratio - 1) < 4 * err + 1e-3), (ratio, err)


@pytest.mark.slow
def test_against_a_surrogate_engine_sample_uses_its_weights(tmp_path, spec, quick_data, capsys):
    # The importance-weighted exact sample of the surrogate engine (the demo's engine) on the template
    # model: its weighted sds match the Fisher σ within 10 % (closed form: Gelman et al. 2013 §14.2).
    from test_surrogate_run import engine_config
    cfg, chain = engine_config(tmp_path, quick_data, ess=600)
    assert main(["--quiet", "run", str(cfg)]) == 0
    capsys.readouterr()
    out = tmp_path / "fc"
    assert main(["forecast", str(spec), "--config", str(cfg), "--against", str(chain), "--out", str(out)]) == 0
    assert "importance-weighted" in capsys.readouterr().out
    against = json.loads((out / "forecast.json").read_text())["against"]
    ratio = np.array(against["ratio"])
    assert np.all(np.abs(ratio - 1) < 0.10) and np.all(np.isfinite(against["posterior_sd_error"])), against


@pytest.mark.slow
def test_worker_processes_give_the_in_process_result_bit_for_bit(tmp_path, spec):
    # The stencil through a pool of isolated workers (infer.parallel) equals the in-process one.
    cfg = config.load(run_file(tmp_path))
    here = fc.forecast(fc.prepare(spec, cfg), workers=0, interactive=False)
    pool = fc.forecast(fc.prepare(spec, cfg), workers=2, interactive=False)
    np.testing.assert_array_equal(here.fisher.matrix, pool.fisher.matrix)
    assert here.calls == pool.calls


# -- bad input: one line, exit 2, no theory call, nothing written ---------------------------------------
@pytest.fixture
def calls(monkeypatch):
    count = {"n": 0}
    original = TemplateTheory.compute

    def counting(self, params):
        count["n"] += 1
        return original(self, params)
    monkeypatch.setattr(TemplateTheory, "compute", counting)
    return count


def one_line(capsys, *words):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("infer: error: ") and "Traceback" not in err[0], err
    for w in words:
        assert w in err[0], (w, err[0])


def test_bad_input(tmp_path, spec, capsys, calls):
    cfg = run_file(tmp_path)
    out = tmp_path / "fc"
    argv = ["forecast", str(spec), "--config", str(cfg), "--out", str(out)]
    assert main(["forecast", str(tmp_path / "nowhere.toml"), "--config", str(cfg), "--out", str(out)]) == 2
    one_line(capsys, "nowhere.toml", "no such")
    nofid = tmp_path / "nofid.toml"
    nofid.write_text("\n".join(ln for ln in SPEC.read_text().splitlines()
                               if not ln.startswith(("[fiducial]", "a_"))))
    assert main(["forecast", str(nofid), "--config", str(cfg), "--out", str(out)]) == 2
    one_line(capsys, "nofid.toml", "[fiducial]")
    # a run parameter the spec cannot predict: the CAMB spec of Kestrel has no template amplitude
    assert main(["forecast", str(REPO / "configs" / "kestrel.toml"), "--config", str(cfg), "--out", str(out)]) == 2
    one_line(capsys, "parameters.a_1", "kestrel.toml", "no fiducial value")
    # a fiducial outside the run's prior support is refused (before the stencil)
    bad_prior = run_file(tmp_path, a4_prior="{ uniform = [1.5, 3.0] }", a4_guess=2.0)
    assert main(["forecast", str(spec), "--config", str(bad_prior), "--out", str(out)]) == 2
    one_line(capsys, "a_4", "outside the prior support")
    calls["n"] = 0
    cfg = run_file(tmp_path)
    assert main(argv + ["--burn", "10"]) == 2
    one_line(capsys, "--burn", "--against")
    assert main(argv + ["--against", str(tmp_path / "absent.h5")]) == 2
    one_line(capsys, "absent.h5")
    assert main(argv + ["--rtol", "2"]) == 2
    one_line(capsys, "--rtol")
    assert calls["n"] == 0 and not out.exists()
    # a folder holding someone else's files is left alone, even with --replace
    out.mkdir()
    (out / "forecast.md").write_text("my notes")
    assert main(argv + ["--replace"]) == 2
    one_line(capsys, "not an earlier infer forecast")
    assert (out / "forecast.md").read_text() == "my notes" and calls["n"] == 0
