"""Stopping rules, automatic burn-in and progress reporting on the exactly solvable model.

The thresholds follow Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021 (Bayesian Analysis 16, 667):
R̂ < 1.01 and bulk/tail ESS above a target; the τ multiple follows Foreman-Mackey et al. 2013 (PASP 125,
306). The diagnostics themselves are checked against ArviZ and emcee in test_diagnostics.py.
"""
from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from infer.analysis import diagnostics
from infer.cli import main
from infer.store.chainfile import ChainStore


@pytest.mark.slow
def test_run_stops_itself_when_targets_are_met(write_config, capsys):
    cfg, chain = write_config(steps=3000, check_every=50,
                              stopping_extra="ess_above = 400\ntau_multiple = 30\nmin_steps = 100")
    cfg.write_text(cfg.read_text().replace("ess_above = 1e9\n", ""))
    assert main(["run", str(cfg)]) == 0
    state = ChainStore(str(chain)).read()
    conv = state.convergence
    assert state.samples.meta["stop_reason"] == "converged"
    assert state.steps_done < 3000                       # it stopped by itself, well before the maximum
    assert state.steps_done % 50 == 0                    # at a check
    assert conv["met"][-1] == 1 and not conv["met"][:-1].any()
    assert conv["step"][-1] == state.steps_done
    # The stored figures are the reason: they meet every target at the last check …
    assert conv["rhat_max"][-1] < 1.01
    assert min(conv["ess_bulk_min"][-1], conv["ess_tail_min"][-1]) > 400
    assert state.steps_done > 30 * conv["tau_max"][-1]
    # … and recomputing them from the stored draws gives the same numbers.
    s = state.samples
    tau_all = max(d["tau"] for d in diagnostics.all_diagnostics(
        np.concatenate([s.position, s.derived], axis=-1), list(s.all_names)).values())
    burn = diagnostics.burn_in(tau_all, s.steps)
    kept = np.concatenate([s.position, s.derived], axis=-1)[burn:]
    per = diagnostics.all_diagnostics(kept, list(s.all_names))
    assert np.isclose(max(d["rhat"] for d in per.values()), conv["rhat_max"][-1])
    err = capsys.readouterr().err
    assert "converged after" in err


def test_max_steps_is_reported_as_not_converged(write_config, capsys):
    cfg, chain = write_config(steps=60, check_every=20)
    assert main(["run", str(cfg)]) == 0
    state = ChainStore(str(chain)).read()
    assert state.samples.meta["stop_reason"] == "max-steps"
    assert "WITHOUT meeting the stopping targets" in capsys.readouterr().err
    assert len(state.convergence["step"]) == 3 and not state.convergence["met"].any()


def test_batch_progress_lines_and_status(write_config, tmp_path):
    cfg, chain = write_config(steps=120, check_every=40)
    text = cfg.read_text().replace("[sampling]\n", "[sampling]\nlog_minutes = 0.00001\n")
    cfg.write_text(text)
    # stderr is a pipe here (a batch job): periodic log lines instead of a live bar.
    out = subprocess.run([sys.executable, "-m", "infer", "run", str(cfg)], capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == 0, out.stderr
    lines = [l for l in out.stderr.splitlines() if "R̂max" in l and "ESSmin" in l]
    assert lines, out.stderr
    st = subprocess.run([sys.executable, "-m", "infer", "status", str(chain), "--params"], capture_output=True,
                        text=True, timeout=120)
    assert st.returncode == 0, st.stderr
    for word in ("steps     120", "R̂ max", "ESS min", "burn-in", "verdict", "a_1", "calls per effective sample"):
        assert word in st.stdout, (word, st.stdout)


@pytest.mark.slow
def test_summary_states_burn_in_and_verdict(write_config):
    cfg, chain = write_config(steps=200, check_every=100)
    assert main(["--quiet", "run", str(cfg), "--summarize"]) == 0
    md = (chain.parent / chain.stem / "constraints.md").read_text()
    assert "Burn-in discarded" in md and "automatic" in md
    assert main(["--quiet", "summarize", str(chain), "--burn", "50", "--no-model"]) == 0
    md = (chain.parent / chain.stem / "constraints.md").read_text()
    assert "first 50 steps" in md and "--burn" in md
