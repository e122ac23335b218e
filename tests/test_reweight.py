"""``infer reweight``: importance reweighting of a finished chain, against closed forms and a direct run.

References:
* The linear-Gaussian model (band powers linear in the template amplitudes, Gaussian noise, Gaussian or
  flat priors) has the Gaussian posterior Σ_post = (Aᵀ C⁻¹ A + Σ_prior⁻¹)⁻¹, μ_post = Σ_post (Aᵀ C⁻¹ d +
  Σ_prior⁻¹ μ_prior) (Gelman et al. 2013, *Bayesian Data Analysis*, 3rd ed., §14.2). A Gaussian prior on
  a linear combination uᵀa (the derived a_sum, u = 1) adds u uᵀ/s² to the precision and u m/s² to the
  linear term; two independent datasets add their Aᵀ C⁻¹ A and Aᵀ C⁻¹ d terms.
* Two independent measurements d₁, d₂ of the same bands (same windows) with covariances C₁, C₂ have
  ln L₁ + ln L₂ = ln N(d̄; m, C̄) + const for every model m, with C̄ = (C₁⁻¹ + C₂⁻¹)⁻¹ and
  d̄ = C̄ (C₁⁻¹ d₁ + C₂⁻¹ d₂) (inverse-variance combination, completing the square; common practice):
  the direct run on both datasets is a run on that one combined dataset.
* Monte Carlo errors of the reweighted estimates: the delta method for self-normalised importance
  sampling (Owen 2013, ch. 9), as `infer.analysis.weighted` computes them.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from infer import data as datasets
from infer.analysis import reweight as rw
from infer.analysis.diagnostics import ess_bulk
from infer.analysis.weighted import weighted_constraints
from infer.cli import main
from infer.errors import UserError
from infer.store.chainfile import ChainStore
from infer.store.reweighted import ReweightedFile
from infer.theory.templates import TemplateTheory

from conftest import quick_config_text

REPO = Path(__file__).resolve().parents[1]
SPEC = REPO / "configs" / "quick_experiment.toml"
Z = 4.5                                   # Monte Carlo sigmas allowed for a mean


def _design(path):
    bp = datasets.load(path) if isinstance(path, (str, Path)) else path
    A = TemplateTheory(bp.ell_max_needed, {}).design_matrix(bp.kind, bp.window_ell, bp.window)
    return A, np.linalg.inv(bp.covariance), bp.value


def closed_form(data_paths, precision=None, shift=None):
    """(μ, Σ) of the linear-Gaussian posterior over the datasets (paths or `BandPowers`; flat priors far from
    the mass) with an
    added Gaussian prior of precision ``precision`` and linear term ``shift`` (module docstring)."""
    F, b = np.zeros((4, 4)), np.zeros(4)
    for p in data_paths:
        A, cinv, d = _design(p)
        F, b = F + A.T @ cinv @ A, b + A.T @ cinv @ d
    if precision is not None:
        F, b = F + precision, b + shift
    cov = np.linalg.inv(F)
    return cov @ b, cov


def _weighted(path):
    ws = ReweightedFile(str(path)).read().weighted_sample()
    cons, info = weighted_constraints(ws)
    return {c.name: c for c in cons}, info


def _check(cons, mean, cov, names=("a_1", "a_2", "a_3", "a_4")):
    sd = np.sqrt(np.diag(cov))
    for i, n in enumerate(names):
        c = cons[n]
        z = (c.mean - mean[i]) / c.mcse["mean"]
        assert abs(z) < Z, (n, c.mean, mean[i], c.mcse["mean"])
        assert abs(c.sd - sd[i]) < 5 * c.mcse["sd"] + 0.02 * sd[i], (n, c.sd, sd[i], c.mcse["sd"])


@pytest.fixture(scope="module")
def chain(tmp_path_factory, quick_data):
    """A converged chain of the template model on the quick dataset (flat priors on [0, 3])."""
    d = tmp_path_factory.mktemp("rw")
    cfg = d / "run.toml"
    cfg.write_text(quick_config_text(quick_data, d / "chain.h5", steps=900, check_every=900, checkpoint_steps=300))
    assert main(["--quiet", "run", str(cfg)]) == 0
    return d / "chain.h5", cfg


@pytest.fixture(scope="module")
def tiny_chain(tmp_path_factory, quick_data):
    d = tmp_path_factory.mktemp("rw_tiny")
    cfg = d / "run.toml"
    cfg.write_text(quick_config_text(quick_data, d / "chain.h5", steps=40, check_every=40))
    assert main(["--quiet", "run", str(cfg)]) == 0
    return d / "chain.h5", cfg


# -- against the closed form ------------------------------------------------------------------------


@pytest.mark.slow
def test_gaussian_prior_on_a_parameter_gives_the_closed_form(chain, quick_data, tmp_path):
    path, _ = chain
    out = tmp_path / "prior.h5"
    m, s = 0.99, 0.02                     # about the likelihood's own width (σ(a_1) ≈ 0.025): a real change
    assert main(["--quiet", "reweight", str(path), "--prior", f"a_1=normal:{m},{s}", "--out", str(out)]) == 0
    P = np.zeros((4, 4))
    P[0, 0] = 1 / s**2
    mean, cov = closed_form([quick_data], P, np.array([m / s**2, 0, 0, 0]))      # Gelman et al. 2013, BDA §14.2
    cons, info = _weighted(out)
    assert info["ess"] > 300 and info["khat"] < 0.7
    _check(cons, mean, cov)
    # the prior pulled a_1 by several Monte Carlo errors: the test can tell reweighted from not
    flat, _ = closed_form([quick_data])
    assert abs(mean[0] - flat[0]) > 10 * cons["a_1"].mcse["mean"]


@pytest.mark.slow
def test_gaussian_prior_on_a_derived_quantity_gives_the_closed_form(chain, quick_data, tmp_path):
    path, _ = chain
    out = tmp_path / "derived.h5"
    m, s = 3.93, 0.03                     # on a_sum = Σ a_k (derived), σ(a_sum) ≈ 0.05 without it
    assert main(["--quiet", "reweight", str(path), "--prior", f"a_sum=normal:{m},{s}", "--out", str(out)]) == 0
    u = np.ones(4)
    mean, cov = closed_form([quick_data], np.outer(u, u) / s**2, u * m / s**2)      # Gelman et al. 2013, BDA §14.2
    cons, _ = _weighted(out)
    _check(cons, mean, cov)
    c = cons["a_sum"]
    assert abs(c.mean - u @ mean) < Z * c.mcse["mean"]
    rec = ReweightedFile(str(out)).read()
    assert rec.change["kind"] == "prior" and rec.report["exact_calls"] == 0
    assert rec.parent["path"] == str(path.resolve()) and len(rec.parent["sha256"]) == 64
    assert rec.parent["kind"] == "ensemble" and rec.parent["thin"] >= 1


def _noisy_second_dataset(tmp_path, fsky: str = "0.005") -> Path:
    """A second, independent and weaker mock dataset of the same bands (default a tenth of the sky: ten times
    the Knox variance), made by `infer simulate`."""
    spec = tmp_path / "second_experiment.toml"
    text = SPEC.read_text()
    assert "fsky = 0.05\n" in text
    spec.write_text(text.replace("fsky = 0.05\n", f"fsky = {fsky}\n"))
    out = tmp_path / "second.h5"
    assert main(["--quiet", "simulate", str(spec), str(out), "--seed", "8"]) == 0
    return out


def _combined(paths, out) -> Path:
    """The inverse-variance combination of datasets of the same bands (module docstring)."""
    bps = [datasets.load(p) for p in paths]
    cinv = [np.linalg.inv(b.covariance) for b in bps]
    cov = np.linalg.inv(sum(cinv))
    cov = 0.5 * (cov + cov.T)
    value = cov @ sum(ci @ b.value for ci, b in zip(cinv, bps))
    b = bps[0]
    bp = datasets.from_arrays(kind=b.kind, ell_lo=b.ell_lo, ell_hi=b.ell_hi, ell_eff=b.ell_eff, value=value,
                              covariance=cov, window_ell=b.window_ell, window=b.window, units="Dl_uK2",
                              experiment="both (inverse-variance combination)")
    datasets.write(bp, str(out))
    return out


@pytest.mark.slow
def test_second_dataset_equals_a_direct_run_on_both(chain, quick_data, tmp_path):
    path, cfg = chain
    second = _noisy_second_dataset(tmp_path)
    target = tmp_path / "second.toml"
    target.write_text(cfg.read_text().replace(str(quick_data), str(second)))
    out = tmp_path / "both.h5"
    assert main(["--quiet", "reweight", str(path), str(target), "--add", "--out", str(out)]) == 0
    rec = ReweightedFile(str(out)).read()
    assert rec.change["kind"] == "add-data" and rec.report["exact_calls"] == rec.report["draws"]
    mean, cov = closed_form([quick_data, second])      # Gelman et al. 2013, BDA §14.2
    cons, info = _weighted(out)
    assert info["ess"] > 300
    _check(cons, mean, cov)
    # the direct run on both datasets
    both = _combined([quick_data, second], tmp_path / "both_data.h5")
    direct = tmp_path / "direct.toml"
    direct.write_text(quick_config_text(both, tmp_path / "direct.h5", steps=900, check_every=900,
                                        checkpoint_steps=300, seed=23))
    assert main(["--quiet", "run", str(direct)]) == 0
    s = ChainStore(str(tmp_path / "direct.h5")).read().samples.after(200)
    x = s.position.reshape(-1, 4)
    ess = np.array([ess_bulk(np.moveaxis(s.position[..., i], 0, -1).reshape(-1, s.steps)) for i in range(4)])
    err_direct = x.std(0, ddof=1) / np.sqrt(ess)
    for i, n in enumerate(s.names):
        err = np.hypot(cons[n].mcse["mean"], err_direct[i])
        assert abs(cons[n].mean - x[:, i].mean()) < Z * err, (n, cons[n].mean, x[:, i].mean(), err)
    # the closed form of the combined dataset is the closed form of the two (the identity behind it)
    m2, c2 = closed_form([both])      # Gelman et al. 2013, BDA §14.2
    assert np.allclose(m2, mean, rtol=0, atol=1e-8) and np.allclose(c2, cov, rtol=1e-6, atol=0)


@pytest.mark.slow
def test_priors_changed_in_a_run_file_need_no_theory_call(chain, quick_data, tmp_path):
    path, cfg = chain
    target = tmp_path / "normal_a1.toml"
    text = cfg.read_text()
    old = "[parameters.a_1]\nprior = { uniform = [0.0, 3.0] }"
    assert old in text
    target.write_text(text.replace(old, "[parameters.a_1]\nprior = { normal = [0.99, 0.02], range = [0.0, 3.0] }"))
    out = tmp_path / "normal_a1.h5"
    assert main(["--quiet", "reweight", str(path), str(target), "--out", str(out)]) == 0
    rec = ReweightedFile(str(out)).read()
    assert rec.report["exact_calls"] == 0 and "stored likelihood" in rec.change["mode"]
    assert rec.provenance["config_text"] == target.read_text()
    P = np.zeros((4, 4))
    P[0, 0] = 1 / 0.02**2
    mean, cov = closed_form([quick_data], P, np.array([0.99 / 0.02**2, 0, 0, 0]))      # Gelman et al. 2013, BDA §14.2
    _check(_weighted(out)[0], mean, cov)


@pytest.mark.slow
def test_a_replaced_dataset_selection_is_computed_exactly(chain, tmp_path):
    from infer import config
    from infer.model.posterior import load_data
    path, cfg = chain
    target = tmp_path / "cut.toml"
    text = cfg.read_text()
    target.write_text(text.replace("[dataset]\n", "[dataset]\nell_min = 80\n", 1))
    out = tmp_path / "cut.h5"
    assert main(["--quiet", "reweight", str(path), str(target), "--out", str(out)]) == 0
    rec = ReweightedFile(str(out)).read()
    assert rec.report["exact_calls"] == rec.report["draws"] and rec.change["kind"] == "run-file"
    cut = load_data(config.load(target))
    assert len(cut.value) < len(datasets.load(config.load(cfg).dataset["file"]).value)
    mean, cov = closed_form([cut])      # Gelman et al. 2013, BDA §14.2
    cons, info = _weighted(out)
    assert info["ess"] > 300
    _check(cons, mean, cov)


@pytest.mark.slow
def test_the_summary_code_reads_the_reweighted_sample(chain, tmp_path):
    from infer.report.summary import write_weighted_summary
    path, _ = chain
    out = tmp_path / "p.h5"
    assert main(["--quiet", "reweight", str(path), "--prior", "a_1=normal:1.0,0.03", "--out", str(out)]) == 0
    files = write_weighted_summary(ReweightedFile(str(out)).read().weighted_sample(), None, tmp_path / "summary")
    assert set(files) == {"markdown", "latex", "triangle", "weights"}
    assert "a_1" in files["markdown"].read_text()


# -- bad input ----------------------------------------------------------------------------------------


def _one_line_error(capsys, last=False) -> str:
    err = capsys.readouterr().err.strip()
    if last:                              # after the warning that τ of the tiny chain is provisional
        err = err.splitlines()[-1]
    assert err.count("\n") == 0 and err.startswith("infer: error: "), err
    assert "Traceback" not in err
    return err


def test_a_target_with_another_parameter_space_is_refused(tiny_chain, tmp_path, capsys):
    path, cfg = tiny_chain
    out = tmp_path / "x.h5"
    wide = tmp_path / "wide.toml"
    wide.write_text(cfg.read_text().replace("[parameters.a_1]\nprior = { uniform = [0.0, 3.0] }",
                                            "[parameters.a_1]\nprior = { uniform = [-1.0, 3.0] }"))
    assert main(["reweight", str(path), str(wide), "--out", str(out)]) == 2
    err = _one_line_error(capsys)
    assert "wide.toml" in err and "parameters.a_1.prior" in err and "parameter space" in err
    fixed = tmp_path / "fixed.toml"
    fixed.write_text(cfg.read_text().replace("[parameters.a_4]\nprior = { uniform = [0.0, 3.0] }\nguess = 1.0\n"
                                             "spread = 0.05\n", "[parameters.a_4]\nvalue = 1.0\n"))
    assert main(["reweight", str(path), str(fixed), "--out", str(out)]) == 2
    err = _one_line_error(capsys)
    assert "fixed.toml" in err and "parameter space" in err
    assert not out.exists()


def test_unusable_weights_are_refused_and_nothing_is_written(tiny_chain, tmp_path, capsys):
    path, _ = tiny_chain
    out = tmp_path / "x.h5"
    assert main(["reweight", str(path), "--prior", "a_1=normal:1.3,0.001", "--out", str(out)]) == 2
    err = _one_line_error(capsys, last=True)
    assert "unusable" in err and "k̂" in err and "Nothing was written" in err
    assert not out.exists()
    # a mild prior passes k̂ but not an ESS floor above the draws available
    assert main(["reweight", str(path), "--prior", "a_1=normal:1.0,0.5", "--out", str(out), "--min-ess", "1e6"]) == 2
    assert "Kish ESS" in _one_line_error(capsys, last=True) and not out.exists()


def test_outputs_are_checked_before_any_work(tiny_chain, tmp_path, capsys):
    path, _ = tiny_chain
    mine = tmp_path / "mine.h5"
    mine.write_bytes(b"the user's own file")
    assert main(["reweight", str(path), "--prior", "a_1=normal:1.0,0.5", "--out", str(mine)]) == 2
    assert "already exists" in _one_line_error(capsys)
    assert main(["reweight", str(path), "--prior", "a_1=normal:1.0,0.5", "--out", str(mine), "--replace"]) == 2
    assert "not an HDF5 file" in _one_line_error(capsys)
    assert mine.read_bytes() == b"the user's own file"
    assert main(["reweight", str(path), "--prior", "a_1=normal:1.0,0.5", "--out", str(path)]) == 2
    assert "never written over" in _one_line_error(capsys)
    assert main(["reweight", str(path), "--out", str(tmp_path / "y.h5")]) == 2
    assert "nothing to change" in _one_line_error(capsys)


@pytest.mark.parametrize("text", ["a_1=normal:1,0", "a_1=normal:1,-2", "a_1=uniform:2,1", "a_1=cauchy:1,2",
                                  "a_1=normal:__import__('os'),1", "1a=normal:1,2", "a_1=normal:1e999,1",
                                  "a_1=normal:1"])
def test_bad_prior_specifications_are_refused_in_one_line(text):
    with pytest.raises(UserError) as err:
        rw.parse_prior(text)
    assert "--prior" in str(err.value) and "\n" not in str(err.value)


def test_prior_specifications_are_read_as_numbers():
    p = rw.parse_prior("H0=normal:67.5,1e-1")
    assert (p.name, p.kind, p.a, p.b) == ("H0", "normal", 67.5, 0.1)
    # normalised densities (scipy.stats as the reference)
    from scipy import stats
    v = np.array([67.0, 67.5, 68.2])
    assert np.allclose(p.log_density(v), stats.norm(67.5, 0.1).logpdf(v))
    u = rw.parse_prior("a_1=uniform:0.5,2")
    assert np.allclose(u.log_density([1.0, 3.0]), [stats.uniform(0.5, 1.5).logpdf(1.0), -np.inf])


def test_new_weights_are_the_density_ratio():
    lw = rw.new_log_weight([0.0, 0.0, -np.inf, 1.0], [-1.0, -2.0, -1.0, -3.0], [-1.5, -np.inf, 0.0, -2.0])
    assert np.array_equal(lw, [-0.5, -np.inf, -np.inf, 2.0])
    # Kish ESS of equal weights is the number of draws (Kish 1965)
    assert rw.judge(np.zeros(500))["ess"] == pytest.approx(500)


def test_weights_of_an_unknown_quantity_are_refused(tiny_chain, tmp_path, capsys):
    path, _ = tiny_chain
    assert main(["reweight", str(path), "--prior", "H0=normal:67,1", "--out", str(tmp_path / "x.h5")]) == 2
    err = _one_line_error(capsys)
    assert "H0" in err and "a_sum" in err


@pytest.mark.slow
@pytest.mark.skipif(not hasattr(__import__("infer.report.summary", fromlist=["x"]), "summarize_reweighted_run"),
                    reason="`infer summarize` of a reweighted file needs the summary.py/tables.py patch of the "
                           "reweight report")
def test_infer_summarize_reads_a_reweighted_chain(chain, tmp_path, capsys):
    path, _ = chain
    out = tmp_path / "new.h5"
    assert main(["--quiet", "reweight", str(path), "--prior", "a_sum=normal:3.95,0.05", "--out", str(out)]) == 0
    capsys.readouterr()
    assert main(["--quiet", "summarize", str(out)]) == 0
    text = capsys.readouterr().out
    assert "reweighted from" in text and str(path.resolve()) in text
    md = (tmp_path / "new" / "constraints.md").read_text()
    assert "importance-reweighted" in md and "a_sum ~ normal(3.95, 0.05)" in md
    assert "surrogate" not in md
    assert (tmp_path / "new" / "weights.png").is_file() and (tmp_path / "new" / "bandpowers.png").is_file()
    assert main(["summarize", str(out), "--burn", "10"]) == 2


# -- exact calls: evaluators, checkpoints, the surrogate engine's sample ----------------------------------


def _add_target(cfg, quick_data, second, path, extra=""):
    text = cfg.read_text().replace(str(quick_data), str(second))
    path.write_text(text.replace('code = "templates"\n', f'code = "templates"\n{extra}\n', 1))
    return path


def _arrays(path):
    s = ReweightedFile(str(path)).read().sample
    return {k: s[k] for k in ("position", "log_post", "log_like", "derived", "log_weight")}


@pytest.mark.slow
def test_worker_processes_give_the_same_weights_bit_for_bit(tiny_chain, quick_data, tmp_path):
    path, cfg = tiny_chain
    # A hundredth of the sky: weak enough that the 40-step chain's few draws carry usable weights.
    target = _add_target(cfg, quick_data, _noisy_second_dataset(tmp_path, "0.0005"), tmp_path / "t.toml")
    runs = {}
    for workers in (0, 2):
        out = tmp_path / f"w{workers}.h5"
        assert main(["--quiet", "reweight", str(path), str(target), "--add", "--out", str(out), "--min-ess", "1",
                     "--workers", str(workers)]) == 0
        runs[workers] = _arrays(out)
    for k in runs[0]:
        assert np.array_equal(runs[0][k], runs[2][k], equal_nan=True), k


@pytest.mark.slow
def test_a_stopped_reweighting_continues_from_its_checkpoint(tiny_chain, quick_data, tmp_path, capsys):
    import os
    import signal
    import subprocess
    import sys
    import time
    path, cfg = tiny_chain
    second = _noisy_second_dataset(tmp_path, "0.0005")    # weak: usable weights from the 40-step chain
    slow = _add_target(cfg, quick_data, second, tmp_path / "slow.toml", "delay_seconds = 0.03")
    fast = _add_target(cfg, quick_data, second, tmp_path / "fast.toml")
    out, ref = tmp_path / "stopped.h5", tmp_path / "straight.h5"
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    log = tmp_path / "stderr.txt"
    with open(log, "w") as err:
        proc = subprocess.Popen([sys.executable, "-m", "infer", "reweight", str(path), str(slow), "--add", "--out",
                                 str(out), "--min-ess", "1", "--workers", "0"], stderr=err, env=env)
        deadline = time.monotonic() + 120
        while "exact calls of" not in log.read_text() and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.1)
        time.sleep(1.0)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(60) == 75, log.read_text()
    assert "paused after" in log.read_text() and not out.exists()
    part = ReweightedFile(str(tmp_path / ".stopped.h5.partial")).read_partial()
    assert 0 < part.done.sum() < len(part.done)
    # another change is refused, not mixed in
    capsys.readouterr()
    assert main(["reweight", str(path), str(fast), "--add", "--out", str(out), "--min-ess", "1"]) == 2
    assert "another reweighting" in _one_line_error(capsys, last=True)
    assert main(["--quiet", "reweight", str(path), str(slow), "--add", "--out", str(out), "--min-ess", "1"]) == 0
    assert not (tmp_path / ".stopped.h5.partial").exists()
    assert main(["--quiet", "reweight", str(path), str(fast), "--add", "--out", str(ref), "--min-ess", "1"]) == 0
    a, b = _arrays(out), _arrays(ref)
    for k in a:
        assert np.array_equal(a[k], b[k], equal_nan=True), k


@pytest.mark.slow
def test_a_surrogate_engine_sample_is_reweighted_with_its_weights(quick_data, tmp_path):
    from test_surrogate_run import engine_config
    cfg, chain = engine_config(tmp_path, quick_data)
    assert main(["--quiet", "run", str(cfg)]) == 0
    out = tmp_path / "eng.h5"
    m, s = 0.99, 0.02
    assert main(["--quiet", "reweight", str(chain), "--prior", f"a_1=normal:{m},{s}", "--out", str(out)]) == 0
    rec = ReweightedFile(str(out)).read()
    assert rec.parent["kind"] == "surrogate"
    P = np.zeros((4, 4))
    P[0, 0] = 1 / s**2
    mean, cov = closed_form([quick_data], P, np.array([m / s**2, 0, 0, 0]))      # Gelman et al. 2013, BDA §14.2
    cons, _ = _weighted(out)
    _check(cons, mean, cov)
    assert main(["reweight", str(chain), "--prior", "a_1=normal:1,1", "--thin", "2",
                 "--out", str(tmp_path / "x.h5")]) == 2          # no burn-in or thinning of a weighted sample
