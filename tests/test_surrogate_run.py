"""`infer run` with the surrogate engine: exact posterior, evidence, crash safety and bad input.

References: the closed-form posterior of the linear-Gaussian template model (Gelman et al. 2013, Bayesian
Data Analysis, 3rd ed., §14.2: Σ = (AᵀC⁻¹A)⁻¹, μ = Σ AᵀC⁻¹d for flat priors) and its closed-form evidence
with a flat prior on a box that holds the whole posterior: Z = L_max (2π)^{P/2} |Σ|^{1/2} / V_box.
Monte Carlo errors from the weight ESS (Kish 1965).
"""
from __future__ import annotations

import math
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from infer import data as datasets
from infer.cli import main
from infer.store.enginefile import EngineFile
from infer.theory.templates import TemplateTheory

from conftest import analytic_posterior, quick_config_text

REPO = Path(__file__).resolve().parents[1]
ENV = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))


def engine_config(tmp_path, data, name="eng", surrogate="", ess=600, theory_extra="", workers=0):
    chain = tmp_path / "chains" / f"{name}.h5"
    text = quick_config_text(data, chain, workers=workers, theory_extra=theory_extra)
    text = text.replace("[sampling]\n", "[sampling]\nengine = \"surrogate\"\n", 1)
    text = text.replace("ess_above = 1e9", f"ess_above = {ess}")
    text += "\n[surrogate]\nround_size = 128\nbatch = 16\nevidence_draws = 20000\n" + surrogate
    path = tmp_path / f"{name}.toml"
    path.write_text(text)
    return path, chain


def closed_form_evidence(data_path):
    bp = datasets.load(data_path)
    A = TemplateTheory(bp.ell_max_needed, {}).design_matrix(bp.kind, bp.window_ell, bp.window)
    mean, cov = analytic_posterior(data_path)
    r = bp.value - A @ mean
    cinv = np.linalg.inv(bp.covariance)
    chi2 = float(r @ cinv @ r)
    sign, logdet_c = np.linalg.slogdet(2 * math.pi * bp.covariance)
    ln_lmax = -0.5 * chi2 - 0.5 * logdet_c
    sign, logdet_s = np.linalg.slogdet(cov)
    return ln_lmax + 0.5 * len(mean) * math.log(2 * math.pi) + 0.5 * logdet_s - len(mean) * math.log(3.0)


@pytest.mark.slow
def test_surrogate_run_gives_the_closed_form_posterior_and_evidence(tmp_path, quick_data):
    path, chain = engine_config(tmp_path, quick_data)
    assert main(["--quiet", "run", str(path)]) == 0
    st = EngineFile(str(chain)).read()
    rep, s = st.report, st.sample
    assert rep["converged"] and rep["ess"] >= 600 and rep["khat"] < 0.7
    assert rep["exact_calls"] == st.calls_done                 # every exact call is in the file
    w = np.exp(s["log_weight"] - s["log_weight"].max())
    w /= w.sum()
    mean, cov = analytic_posterior(quick_data)
    sd = np.sqrt(np.diag(cov))
    m = w @ s["position"]
    v = np.sqrt(w @ (s["position"] - m) ** 2)
    ess = rep["ess"]
    assert np.all(np.abs(m - mean) < 4 * sd / math.sqrt(ess)), (m, mean)
    assert np.all(np.abs(v / sd - 1) < 4 / math.sqrt(2 * ess) + 0.01), (v, sd)
    lnz = closed_form_evidence(quick_data)
    assert abs(rep["ln_z"] - lnz) < 4 * rep["ln_z_err"] + 0.02, (rep["ln_z"], lnz, rep["ln_z_err"])
    assert rep["calls_per_effective_sample"] < 1.5


def _spawn(*args, log):
    with open(log, "a") as err:
        return subprocess.Popen([sys.executable, "-m", "infer", *map(str, args)], env=ENV,
                                stdout=subprocess.DEVNULL, stderr=err, start_new_session=True)


def _calls(chain):
    try:
        with h5py.File(chain, "r", locking=False) as f:
            return int(f.attrs["calls_done"])
    except (OSError, KeyError):
        return 0


@pytest.mark.slow
def test_kill_and_sigterm_then_resume_give_the_identical_weighted_sample(tmp_path, quick_data):
    # A slow theory (20 ms a call) so that the kills land mid-run.
    path, chain = engine_config(tmp_path, quick_data, theory_extra="delay_seconds = 0.02")
    # The reference needs no delay: delay_seconds is run control, it changes no value (config.RUN_CONTROL_THEORY_KEYS).
    ref_path, ref_chain = engine_config(tmp_path, quick_data, name="ref")
    assert main(["--quiet", "run", str(ref_path)]) == 0
    ref = EngineFile(str(ref_chain)).read()
    log = tmp_path / "log.txt"
    proc = _spawn("run", path, log=log)
    t0 = time.monotonic()
    while _calls(chain) < 100 and time.monotonic() - t0 < 120:
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait(timeout=60)
    killed_at = _calls(chain)
    assert 100 <= killed_at < ref.calls_done
    proc = _spawn("resume", chain, log=log)
    while _calls(chain) < killed_at + 200 and time.monotonic() - t0 < 240:
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGTERM)
    assert proc.wait(timeout=60) == 75, log.read_text()
    assert main(["--quiet", "resume", str(chain)]) == 0, log.read_text()
    got = EngineFile(str(chain)).read()
    for key in ref.sample:
        np.testing.assert_array_equal(got.sample[key], ref.sample[key])
    np.testing.assert_array_equal(got.rows.position, ref.rows.position)
    assert got.report["ln_z"] == ref.report["ln_z"]


@pytest.mark.parametrize("surrogate, words", [
    ("design_points = 3\n", "design_points"),                     # cannot fit 4 parameters
    ("round_size = 8\nbatch = 16\n", "batch"),
    ("khat_max = 1.5\n", "khat_max"),
    ("method = \"neural\"\n", "method"),
    ("max_exact = 10\n", "max_exact"),
    ("colour = 1\n", "colour"),
])
def test_bad_surrogate_settings_are_one_line_before_any_theory_call(tmp_path, quick_data, capsys, surrogate, words):
    # Any theory call would kill the process (exit 3): exit 2 shows there was none.
    path, chain = engine_config(tmp_path, quick_data, surrogate=surrogate,
                                theory_extra='fault = { parameter = "a_1", above = -1e9, action = "exit" }')
    text = path.read_text()
    if "round_size = 8" in surrogate:
        text = text.replace("round_size = 128\nbatch = 16\n", "")
    path.write_text(text)
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and words in err[0] and str(path) in err[0], err
    assert not chain.exists()


def test_surrogate_table_needs_the_surrogate_engine(tmp_path, quick_data, capsys):
    path, chain = engine_config(tmp_path, quick_data)
    path.write_text(path.read_text().replace('engine = "surrogate"\n', ""))
    assert main(["run", str(path)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "sampling.engine" in err[0]


@pytest.mark.slow
def test_resume_with_a_larger_target_equals_a_direct_run(tmp_path, quick_data):
    # The engine's path does not depend on the weight-ESS target, so continuing a run with a larger target
    # repeats its exact calls one for one (the replay log checks it) and ends where a direct run ends.
    small, chain = engine_config(tmp_path, quick_data, name="small", ess=300)
    big, big_chain = engine_config(tmp_path, quick_data, name="big", ess=900)
    assert main(["--quiet", "run", str(small)]) == 0
    first = EngineFile(str(chain)).read()
    assert first.report["converged"] and first.report["ess"] >= 300
    moved = tmp_path / "small_more.toml"
    moved.write_text(small.read_text().replace("ess_above = 300", "ess_above = 900"))
    assert main(["--quiet", "resume", str(chain), "--config", str(moved)]) == 0
    assert main(["--quiet", "run", str(big)]) == 0
    got, ref = EngineFile(str(chain)).read(), EngineFile(str(big_chain)).read()
    assert got.report["ess"] >= 900 and got.calls_done > first.calls_done
    np.testing.assert_array_equal(got.rows.position[:first.calls_done], first.rows.position)
    for key in ref.sample:
        np.testing.assert_array_equal(got.sample[key], ref.sample[key])


@pytest.mark.slow
def test_a_run_stopped_by_its_budget_resumes_with_a_larger_one_to_the_direct_result(tmp_path, quick_data, capsys):
    # The budget cuts the last round short; a resume with a larger budget must repeat those calls and end
    # where a direct run with the larger budget ends (the round's draws do not depend on the budget).
    short, chain = engine_config(tmp_path, quick_data, name="short", ess=600, surrogate="max_exact = 400\n")
    full, full_chain = engine_config(tmp_path, quick_data, name="full", ess=600)
    assert main(["--quiet", "run", str(short)]) == 0
    cut = EngineFile(str(chain)).read()
    assert not cut.report["converged"] and any("budget" in m for m in cut.report["missing"])
    assert cut.calls_done <= 400
    more = tmp_path / "short_more.toml"
    more.write_text(short.read_text().replace("max_exact = 400\n", ""))
    assert main(["--quiet", "resume", str(chain), "--config", str(more)]) == 0
    assert main(["--quiet", "run", str(full)]) == 0
    got, ref = EngineFile(str(chain)).read(), EngineFile(str(full_chain)).read()
    assert got.report["converged"]
    for key in ref.sample:
        np.testing.assert_array_equal(got.sample[key], ref.sample[key])
