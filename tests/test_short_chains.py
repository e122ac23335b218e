"""Honest figures on short chains: no τ, ESS or cost per effective sample a reader could quote when the
run is shorter than the τ-multiple rule.

References used below:
* A Gaussian AR(1) process x_t = ρ x_{t−1} + sqrt(1 − ρ²) ε_t has integrated autocorrelation time
  τ = (1 + ρ)/(1 − ρ) (textbook; e.g. Sokal 1997, "Monte Carlo methods in statistical mechanics",
  lecture notes; from memory). ρ = 14/15 gives τ = 29 steps.
* The 50 τ rule for trusting τ: Foreman-Mackey et al. 2013, PASP 125, 306 and emcee's documentation
  (common practice); it is the run file's ``[stopping] tau_multiple`` default.
"""
from __future__ import annotations

import re
from types import SimpleNamespace

import numpy as np
import pytest

from infer.analysis import burnin, diagnostics, marginals
from infer.analysis.samples import Samples
from infer.cli import main
from infer.config import Stopping
from infer.report import tables
from infer.report.status import status_report

RHO = 14 / 15
TAU = (1 + RHO) / (1 - RHO)            # 29 steps (AR(1) closed form, see module docstring)


def ar1_chain(steps, ens=2, walk=16, seed=1):
    rng = np.random.default_rng(seed)
    x = np.empty((steps, ens, walk, 2))
    z = rng.standard_normal((ens, walk, 2))            # start in the stationary distribution
    for t in range(steps):
        z = RHO * z + np.sqrt(1 - RHO**2) * rng.standard_normal(z.shape)
        x[t] = z
    pos = np.stack([0.3 + 0.05 * x[..., 0], 2.0 + 0.3 * x[..., 1]], axis=-1)
    lp = -0.5 * np.sum(x**2, axis=-1)
    return Samples(("a", "b"), ("ab",), pos, (pos[..., 0] * pos[..., 1])[..., None], lp, lp,
                   tex={"a": r"\omega_x", "b": "n_y", "ab": r"\omega_x n_y"},
                   bounds={"a": (-5.0, 5.0), "b": (-5.0, 10.0)}, meta={"run": "short"})


def fake_state(s):
    state = SimpleNamespace(samples=s, steps_done=s.steps, rejections={}, failures=[],
                            provenance={"run_name": "short", "dataset_file": "/data/mock.h5"})
    cfg = SimpleNamespace(sampling=SimpleNamespace(steps=400, ensembles=s.position.shape[1],
                                                   walkers=s.position.shape[2]), stopping=Stopping())
    return state, cfg


def numbers(line: str) -> set[str]:
    return set(re.findall(r"\d+(?:\.\d+)?", line))


@pytest.fixture(scope="module")
def short():
    return ar1_chain(16)


def test_the_estimate_on_a_short_chain_is_misleading(short):
    # The premise: on 16 steps the estimator returns a τ far below the true 29 steps …
    tau = diagnostics.autocorr_time(short.column("a").reshape(16, -1).T)
    assert tau < TAU / 5
    # … and the τ-multiple rule knows it cannot be trusted (also as the estimator's own criterion).
    assert not burnin.tau_trusted(16, tau, 50)
    assert not diagnostics.autocorr_reliable(short.column("a").reshape(16, -1).T, tau)
    assert not burnin.choose(short).trusted and "not yet measurable" in burnin.choose(short).rule()


def test_status_shows_no_quotable_tau_or_ess(short):
    state, cfg = fake_state(short)
    text = status_report(state, cfg, "short.h5", params=True)
    lines = {ln.split()[0] if ln.strip() else "": ln for ln in text.splitlines()}
    tau_line = next(ln for ln in text.splitlines() if ln.startswith("τ max"))
    ess_line = next(ln for ln in text.splitlines() if ln.startswith("ESS min"))
    cost_line = lines["cost"]
    assert "not yet measurable" in tau_line and numbers(tau_line) <= {"16", "50"}, tau_line
    assert "unreliable" in ess_line and numbers(ess_line) <= {"1000"}, ess_line
    assert "not yet measurable" in cost_line and not re.search(r"\d\s+calls per effective", cost_line)
    verdict = lines["verdict"]
    assert "ESS not yet measurable" in verdict and not re.search(r"ESS \d", verdict), verdict
    rows = [ln for ln in text.splitlines() if ln.split()[:1] in (["a"], ["b"], ["ab"])]
    assert len(rows) == 3
    for row in rows:
        assert row.split()[2:] == ["unreliable", "unreliable", "unmeasured"], row


def test_tables_show_no_quotable_tau_or_ess(short):
    cons, info = marginals.constraints(short)
    assert info["untrusted"] == ["a", "b", "ab"] and not info["converged"]
    assert all(not c.trusted and c.flagged(1.01, 1000) for c in cons)
    md = tables.markdown_table(cons, info)
    rows = [ln for ln in md.splitlines() if ln.startswith("| `")]
    assert len(rows) == 3
    for row in rows:
        cells = [c.strip() for c in row.strip("|").split("|")]
        assert cells[-2:] == [tables.UNRELIABLE] * 2, row          # ESS and τ cells carry no number
    assert "¶ The run (16 steps) is shorter than 50" in md
    assert "**Not converged**" in md and "smallest trusted" not in md
    tex = tables.latex_table(cons, info)
    assert "NOT YET MEASURABLE" in tex and tex.count(r"^\dagger") == 3


def test_a_long_enough_chain_shows_numbers_close_to_the_truth():
    s = ar1_chain(3000, seed=2)
    state, cfg = fake_state(s)
    text = status_report(state, cfg, "long.h5")
    tau_line = next(ln for ln in text.splitlines() if ln.startswith("τ max"))
    tau = float(tau_line.split()[2])
    assert tau == pytest.approx(TAU, rel=0.25)                       # AR(1) closed form
    assert re.search(r"\d+\.\d calls per effective sample", text)
    cons, info = marginals.constraints(s)
    assert all(c.trusted for c in cons) and tables.UNRELIABLE not in tables.markdown_table(cons, info)


def test_summary_folder_is_checked_before_the_theory_is_called(write_config, capsys, monkeypatch):
    cfg, chain = write_config(steps=16, check_every=8)
    assert main(["--quiet", "run", str(cfg)]) == 0
    out = chain.parent / "mine"
    out.mkdir()
    (out / "triangle.png").write_bytes(b"the user's own figure")
    import infer.model.posterior as posterior

    def no_theory(*args, **kwargs):
        raise AssertionError("the theory was set up before the output folder was checked")
    monkeypatch.setattr(posterior.Posterior, "__init__", no_theory)
    capsys.readouterr()
    assert main(["summarize", str(chain), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "triangle.png" in err[0] and "not written by a previous summary" in err[0]
    assert sorted(p.name for p in out.iterdir()) == ["triangle.png"]
    assert (out / "triangle.png").read_bytes() == b"the user's own figure"


def test_cli_status_and_summary_of_a_16_step_run(write_config, capsys):
    cfg, chain = write_config(steps=16, check_every=8)
    assert main(["--quiet", "run", str(cfg)]) == 0
    capsys.readouterr()
    assert main(["status", str(chain), "--params"]) == 0
    out = capsys.readouterr().out
    assert "τ max     not yet measurable" in out and not re.search(r"\d\s+calls per effective", out)
    assert main(["--quiet", "summarize", str(chain), "--no-model"]) == 0
    printed = capsys.readouterr().out.splitlines()[0]
    assert "NOT converged" in printed and not re.search(r"ESS \d|τ = ", printed), printed
    md = (chain.parent / chain.stem / "constraints.md").read_text()
    rows = [ln for ln in md.splitlines() if ln.startswith("| `")]
    assert rows and all(ln.rstrip(" |").endswith(tables.UNRELIABLE) for ln in rows)
    # the stopping rule's verdict in the preamble quotes no ESS or τ either
    rule = next(ln for ln in md.splitlines() if ln.startswith("- Stopping rule of the run"))
    assert "ESS not yet measurable" in rule and not re.search(r"ESS \d|τ = \d", rule), rule
