"""The summary of an importance-weighted exact sample (surrogate engine): constraints, tables, figures, files.

References used below:
* scipy.stats (PyPI reference library): ``norm``, ``truncnorm``, ``multivariate_normal`` (pdf, ppf, rvs) for
  the known targets and proposals; ``chi2(2).ppf(m)`` is the squared Mahalanobis radius of the mass-m
  highest-density region of a 2-D Gaussian.
* Self-normalised importance sampling and its delta-method variance: Owen 2013, *Monte Carlo theory,
  methods and examples*, ch. 9 (from memory). The weights N(0,1)/N(0,2²) of draws from N(0,2²) are exact.
* Pareto k̂ < 0.7 rule: Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25, 72.
* Hyndman & Fan 1996 (Am. Stat. 50, 361) definition 7 is numpy's default quantile, which equal weights
  must reproduce.
"""
from __future__ import annotations

from types import SimpleNamespace

import matplotlib.image as mpimg
import numpy as np
import pytest
from matplotlib.contour import ContourSet
from scipy import stats

from infer.analysis import marginals
from infer.analysis import weights as wts
from infer.analysis.samples import Samples
from infer.analysis.weighted import WeightedSample, engine_info, mcse, weighted_constraints
from infer.config import Stopping
from infer.errors import UserError
from infer.report import figures, summary, tables
from infer.report.status import engine_status_report
from infer.sampling.engine import EngineResult, Laplace, Round
from infer.sampling.exactlog import STAGES, Rows

TARGET, PROPOSAL = stats.norm(0.0, 1.0), stats.norm(0.0, 2.0)


def _is_sample(n, seed):
    """Draws of N(0, 2²) with the exact weights of N(0, 1), plus an independent second quantity."""
    rng = np.random.default_rng(seed)
    x = PROPOSAL.rvs(size=n, random_state=rng)
    y = stats.norm(3.0, 0.5).rvs(size=n, random_state=rng)          # drawn from its target: weight 1
    lw = TARGET.logpdf(x) - PROPOSAL.logpdf(x)
    lp = TARGET.logpdf(x) + stats.norm(3.0, 0.5).logpdf(y)
    return WeightedSample(("x", "y"), ("xy",), np.c_[x, y], (x + y)[:, None], lp, lp - 0.5, lw,
                          tex={"x": "x", "y": "y", "xy": "x+y"}, bounds={"x": (-20, 20), "y": (-20, 20)})


def test_weighted_constraints_reproduce_known_target():
    ws = _is_sample(40_000, 1)
    cons, info = weighted_constraints(ws)
    c = {k.name: k for k in cons}
    truth = {"x": TARGET, "y": stats.norm(3.0, 0.5), "xy": stats.norm(3.0, np.hypot(1.0, 0.5))}
    for name, d in truth.items():
        k, e = c[name], c[name].mcse
        assert abs(k.mean - d.mean()) < 4.5 * e["mean"], name
        assert abs(k.sd - d.std()) < 4.5 * e["sd"], name
        for key, q in (("median", 0.5), ("lo68", 0.16), ("hi68", 0.84), ("lo95", 0.025), ("hi95", 0.975)):
            assert abs(getattr(k, key) - d.ppf(q)) < 4.5 * e[key], (name, key)   # scipy.stats ppf
        assert k.limit is None and k.weighted and np.isnan(k.rhat) and np.isnan(k.tau)
    # Kish ESS of these weights: N / E_q[w²] with E_q[w²] = 4/√7 for N(0,1)/N(0,2²) (Gaussian integral)
    assert info["ess"] == pytest.approx(40_000 * np.sqrt(7) / 4, rel=0.03)
    assert info["khat"] < 0.7 and info["weights_ok"]
    assert info["best"]["index"] == int(np.argmax(ws.log_post))


def test_monte_carlo_errors_match_the_spread_of_repeated_runs():
    # The stated MC errors must equal the scatter of the estimates over independent repetitions
    # (truth from scipy.stats.norm); 400 repetitions give the ratio to about ±4 %.
    z = {k: [] for k in ("mean", "sd", "lo68", "median", "hi95")}
    for seed in range(400):
        rng = np.random.default_rng(1000 + seed)
        x = PROPOSAL.rvs(size=1500, random_state=rng)
        w = np.exp(TARGET.logpdf(x) - PROPOSAL.logpdf(x))
        w /= w.sum()
        est = marginals.marginal(x, None, w)
        err = mcse(x, w, est)
        truth = {"mean": 0.0, "sd": 1.0, "lo68": TARGET.ppf(0.16), "median": 0.0, "hi95": TARGET.ppf(0.975)}
        for k in z:
            z[k].append((est[k] - truth[k]) / err[k])
    for k, v in z.items():
        assert 0.85 < np.std(v) < 1.15, (k, np.std(v))
        assert abs(np.mean(v)) < 0.25, (k, np.mean(v))


def _chain_like(seed=20240611, steps=200, ens=2, walk=25):
    rng = np.random.default_rng(seed)
    n = steps * ens * walk
    edge = stats.truncnorm(a=0.0, b=5.0, loc=0.0, scale=0.2)
    x = np.c_[stats.norm(0.5, 0.1).rvs(size=n, random_state=rng), stats.lognorm(s=0.5).rvs(size=n, random_state=rng),
              edge.rvs(size=n, random_state=rng), stats.uniform(0, 1).rvs(size=n, random_state=rng)]
    lp = stats.norm(0.5, 0.1).logpdf(x[:, 0]) + stats.lognorm(s=0.5).logpdf(x[:, 1]) + edge.logpdf(x[:, 2])
    pos = x.reshape(steps, ens, walk, 4)
    return Samples(("g", "skew", "edge", "flat"), ("gs",), pos, (pos[..., 0] * pos[..., 1])[..., None],
                   lp.reshape(steps, ens, walk), (lp - 1).reshape(steps, ens, walk),
                   bounds={"g": (0, 1), "skew": (0, 20), "edge": (0, 1), "flat": (0, 1)})


def test_equal_weights_reproduce_the_chain_constraints():
    s = _chain_like()
    plain, pinfo = marginals.constraints(s, burn=0)
    pooled = WeightedSample(s.names, s.derived_names, s.position.reshape(-1, 4), s.derived.reshape(-1, 1),
                            s.log_post.ravel(), s.log_like.ravel(), np.zeros(s.log_post.size), bounds=s.bounds)
    weighted, winfo = weighted_constraints(pooled)
    for p, w in zip(plain, weighted):
        assert p.name == w.name
        for key in ("mean", "sd", "median", "lo68", "hi68", "lo95", "hi95"):
            assert getattr(w, key) == pytest.approx(getattr(p, key), rel=1e-12, abs=1e-14), (p.name, key)
        assert w.best == p.best
        assert (p.limit is None) == (w.limit is None)
        if p.limit:
            assert w.limit[0] == p.limit[0] and w.limit[1] == pytest.approx(p.limit[1], rel=1e-12)
    assert winfo["prior_dominated"] == pinfo["prior_dominated"] == ["flat"]
    assert winfo["ess"] == pytest.approx(s.log_post.size)
    # and the quantile helper itself: equal weights are numpy's definition 7 (Hyndman & Fan 1996)
    x = s.position[..., 1].ravel()
    qs = [0.001, 0.16, 0.5, 0.84, 0.999]
    assert np.allclose(marginals.quantile(x, qs, np.ones_like(x)), np.quantile(x, qs), rtol=1e-13, atol=0)


def test_edge_piled_weighted_marginal_is_a_one_sided_limit():
    # Draws uniform on the prior (0, 1), weighted to a half-normal of scale 0.2 piled on 0 (scipy.stats
    # truncnorm as the reference for its 95th percentile); a peak far from the edges gives an interval.
    rng = np.random.default_rng(7)
    n = 40_000
    u = rng.uniform(0, 1, size=(n, 2))
    edge = stats.truncnorm(a=0.0, b=5.0, loc=0.0, scale=0.2)
    peak = stats.truncnorm(a=-5.0, b=5.0, loc=0.5, scale=0.1)
    lw = edge.logpdf(u[:, 0]) + peak.logpdf(u[:, 1])
    ws = WeightedSample(("e", "p"), (), u, np.empty((n, 0)), lw, lw, lw, bounds={"e": (0, 1), "p": (0, 1)})
    c = {k.name: k for k in weighted_constraints(ws)[0]}
    kind, v = c["e"].limit
    assert kind == "upper"
    assert abs(v - edge.ppf(0.95)) < 4.5 * max(c["e"].mcse["hi95"], 1e-3)
    assert c["p"].limit is None
    # the same rule without weights would see a flat marginal and no limit: the weights decide
    assert marginals.edge_limit(u[:, 0], 0, 1) is None
    assert marginals.edge_limit(u[:, 0], 0, 1, np.exp(lw - lw.max()))[0] == "upper"


# -- an engine record ----------------------------------------------------------------------------------


def _engine_run(seed=3, converged=True, n=600):
    """Two correction rounds from different Gaussian proposals around a 2-D Gaussian target, pooled by
    deterministic-mixture weights (Owen & Zhou 2000), in an `EngineResult` of the engine's own classes."""
    rng = np.random.default_rng(seed)
    mean, cov = np.array([0.5, -1.0]), np.array([[0.01, 0.006], [0.006, 0.04]])
    target = stats.multivariate_normal(mean, cov)
    props = [stats.multivariate_normal(mean + [0.02, 0.0], cov * 3.0), stats.multivariate_normal(mean, cov * 1.6)]
    x = np.concatenate([props[0].rvs(size=n, random_state=rng), props[1].rvs(size=n, random_state=rng)])
    lp = target.logpdf(x)
    lw = wts.deterministic_mixture_log_weights(lp, np.stack([q.logpdf(x) for q in props]), [n, n])
    own = [lp[:n] - props[0].logpdf(x[:n]), lp[n:] - props[1].logpdf(x[n:])]
    rounds = [Round(r, n, r * n, wts.psis_khat(own[r]), wts.kish_ess(own[r]), 0.08 / (r + 1), 0.5 / (r + 1))
              for r in range(2)]
    blobs = np.c_[lp - 3.0, x[:, 0] * x[:, 1], -2 * (lp - 3.0)]
    fit, design = 35, 28
    res = EngineResult(x, lp, blobs, lw, wts.kish_ess(lw), wts.psis_khat(lw), -0.02, 0.015, fit + design + 2 * n,
                       fit + design + 2 * n - 4, rounds, 1,
                       {"met": True, "steps": 1400, "rhat_max": 1.0042, "ess_min": 2600.0, "tau_max": 9.0},
                       Laplace(mean, cov, calls=fit), converged, [] if converged else ["exact-call budget 1263 reached"])
    ws = WeightedSample.from_engine(res, ("om", "ns"), ("log_like", "prod", "chi2"),
                                    tex={"om": r"\omega_x", "ns": "n_y", "prod": r"\omega_x n_y", "chi2": r"\chi^2"},
                                    bounds={"om": (0, 1), "ns": (-5, 5)}, meta={"run": "engine-demo"})
    return res, ws


def test_from_engine_and_engine_info():
    res, ws = _engine_run()
    assert ws.names == ("om", "ns") and ws.derived_names == ("prod", "chi2")
    assert np.array_equal(ws.log_like, res.blobs[:, 0]) and np.array_equal(ws.column("chi2"), res.blobs[:, 2])
    assert ws.ess == pytest.approx(res.ess) and np.allclose(ws.weights, res.weights)
    info = engine_info(res, ess_target=1000)
    assert info["calls_by_stage"] == {"fit": 35, "design": 28, "correct": 1200}
    assert [r["calls_after"] for r in info["rounds"]] == [63 + 600, 63 + 1200]
    assert info["rounds"][-1]["ess_so_far"] == pytest.approx(res.ess)
    # the stage counts from the exact-call log, when given, are the log's own
    stage = np.r_[np.full(35, STAGES["fit"]), np.full(28, STAGES["design"]), np.full(1200, STAGES["correct"])]
    rows = Rows(np.zeros((1263, 2)), np.zeros(1263), np.zeros((1263, 3)), stage, [None] * 1263)
    assert engine_info(res, ess_target=1000, exact_rows=rows)["calls_by_stage"] == info["calls_by_stage"]


def test_tables_state_how_the_sample_was_made_and_no_chain_claims():
    res, ws = _engine_run()
    info_e = engine_info(res, ess_target=500)
    cons, info = weighted_constraints(ws, targets=Stopping(ess_above=500))
    md = tables.markdown_table(cons, info, dict(ws.meta), engine=info_e)
    for text in ("1,263 in all", "35 for the best fit", "28 at the surrogate's design points",
                 "1,200 at the correction draws", "surrogate refined 1 time(s)", "RMS |Δ ln p| = 0.04", "worst 0.25",
                 "largest R̂ = 1.0042", "Kish effective sample size", f"k̂ = {info['khat']:.2f}", "k̂ < 0.7",
                 "Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25, 72", "ln Z = -0.020 ± 0.015",
                 "**Converged**", "Best exact draw"):
        assert text in md, text
    assert "| " + " | ".join(tables.WEIGHTED_HEADINGS) + " |" in md
    assert md.count("\n| `") == len(cons)
    # no chain diagnostics for the weighted sample: R̂ only as the proposal chain's, never τ or "unreliable"
    assert "τ" not in md and tables.UNRELIABLE not in md
    assert [ln for ln in md.splitlines() if "R̂" in ln] == [ln for ln in md.splitlines() if "Proposal chain" in ln]
    tex = tables.latex_table(cons, info, engine=info_e)
    tex.encode("ascii")                                     # compiles without input-encoding packages
    assert "importance-weighted exact sample" in tex and "k-hat" in tex and "tau" not in tex
    assert all("Proposal chain" in ln for ln in tex.splitlines() if "R-hat" in ln)
    assert r"\begin{tabular}{lcc}" in tex and " & ".join(tables.LATEX_HEADINGS) + r" \\" in tex
    # a run that stopped short says so and what is missing
    res2, ws2 = _engine_run(converged=False)
    md2 = tables.markdown_table(*weighted_constraints(ws2), engine=engine_info(res2, ess_target=500))
    assert "**Not converged**" in md2 and "exact-call budget 1263 reached" in md2
    # a record that claims convergence is not believed when the weights miss the ESS target
    md3 = tables.markdown_table(*weighted_constraints(ws, targets=Stopping(ess_above=1e6)),
                                engine=engine_info(res, ess_target=1e6))
    assert "**Not converged**" in md3 and "weight ESS" in md3 and md3.count(tables.FLAG) >= len(cons) + 1


def test_weighted_triangle_regions_enclose_the_stated_weight():
    # Draws of a Gaussian twice as wide, weighted to the target N(MEAN, COV): the drawn regions hold
    # 68 % / 95 % of the *weight* and are the target's HPD regions r² ≤ χ²₂.ppf(m) (scipy.stats.chi2).
    mean, cov = np.array([0.5, -1.0]), np.array([[0.01, 0.006], [0.006, 0.04]])
    rng = np.random.default_rng(11)
    g = stats.multivariate_normal(mean, 4 * cov).rvs(size=60_000, random_state=rng)
    lw = stats.multivariate_normal(mean, cov).logpdf(g) - stats.multivariate_normal(mean, 4 * cov).logpdf(g)
    ws = WeightedSample(("g1", "g2"), (), g, np.empty((len(g), 0)), lw, lw, lw, tex={"g1": r"\gamma_1", "g2": r"\gamma_2"})
    w = ws.weights
    fig = figures.triangle_figure(ws, ["g1", "g2"])
    pair = fig.axes[2]
    lines = next(c for c in pair.collections if isinstance(c, ContourSet) and not c.filled)
    d = g - mean
    r2 = np.einsum("ij,ij->i", d, np.linalg.solve(cov, d.T).T)
    for path, mass in zip(lines.get_paths(), (0.95, 0.68)):
        inside = path.contains_points(g)
        assert np.sum(w[inside]) == pytest.approx(mass, abs=0.025), mass
        assert np.sum(w[inside != (r2 <= stats.chi2(2).ppf(mass))]) < 0.03, mass
        assert abs(inside.mean() - mass) > 0.1          # the unweighted share is far off: weights were used
    curve = max(fig.axes[0].lines, key=lambda ln: len(ln.get_xdata()))
    xs, ys = np.asarray(curve.get_xdata()), np.asarray(curve.get_ydata())
    ref = stats.norm(mean[0], np.sqrt(cov[0, 0])).pdf(xs)
    assert np.max(np.abs(ys - ref / ref.max())) < 0.06    # the diagonal is the target's marginal


def test_weights_figure_shows_the_weights_and_the_rounds():
    res, ws = _engine_run()
    info = engine_info(res, ess_target=1000)
    fig = figures.weights_figure(ws, info)
    line = lambda gid: next(ln for ax in fig.axes for ln in ax.lines if ln.get_gid() == gid)
    S = ws.n
    y = np.asarray(line("sorted weights").get_ydata())
    assert np.allclose(y, np.sort(ws.weights)[::-1] * S)
    tail = np.asarray(line("pareto tail").get_ydata())
    assert 0 < tail.size < S
    ess = line("ess by calls")
    assert np.allclose(ess.get_xdata(), [663, 1263]) and np.allclose(ess.get_ydata(), [r["ess_so_far"] for r in info["rounds"]])
    k = np.concatenate([line("round khat ok").get_ydata(), line("round khat poor").get_ydata()])
    assert sorted(k) == sorted(r["khat"] for r in info["rounds"])
    figures.render(figures.weights_figure(ws, None))    # without a record it still draws


def _fake_dataset(seed=4):
    rng = np.random.default_rng(seed)
    lo = np.arange(30, 1000, 50)
    eff = lo + 24.5
    model = 3000 * np.exp(-eff / 600)
    return (SimpleNamespace(kind=np.array(["TT"] * 20), ell_lo=lo, ell_hi=lo + 49, ell_eff=eff,
                            value=model + 40 * rng.standard_normal(20), covariance=np.diag(np.full(20, 1600.0)),
                            to_dl=np.ones(20), spectra=("TT",), experiment="Fictional Array"), model)


@pytest.mark.slow
def test_write_weighted_summary_files_and_the_users_files(tmp_path):
    res, ws = _engine_run()
    info = engine_info(res, ess_target=1000)
    ds, model = _fake_dataset()
    out = tmp_path / "summary"
    out.mkdir()
    keep = out / "notes.txt"
    keep.write_text("mine")
    for _ in range(2):                                       # a second run replaces its own files
        paths = summary.write_weighted_summary(ws, info, out, dataset=ds, best_model=model)
        assert {p.name for p in paths.values()} == {"constraints.md", "constraints.tex", "triangle.png",
                                                    "weights.png", "bandpowers.png", "residuals.png"}
        for p in paths.values():
            assert p.is_file() and p.stat().st_size > 0
            if p.suffix == ".png":
                assert min(mpimg.imread(p).shape[:2]) > 200
    assert keep.read_text() == "mine"
    assert "surrogate engine" in paths["markdown"].read_text()
    assert not (out / "traces.png").exists() and not (out / "convergence.png").exists()
    # a user's file under one of the names is never replaced, and nothing else is written
    other = tmp_path / "other"
    other.mkdir()
    (other / "weights.png").write_bytes(b"my own figure")
    with pytest.raises(UserError, match="weights.png"):
        summary.write_weighted_summary(ws, info, other)
    assert (other / "weights.png").read_bytes() == b"my own figure"
    assert sorted(p.name for p in other.iterdir()) == ["weights.png"]
    # an edited summary file is not replaced either
    paths["latex"].write_text(paths["latex"].read_text() + "% my edit\n")
    with pytest.raises(UserError, match="constraints.tex"):
        summary.write_weighted_summary(ws, info, out)
    assert paths["latex"].read_text().endswith("% my edit\n")
    with pytest.raises(UserError, match="best-sample model"):
        summary.write_weighted_summary(ws, info, tmp_path / "new", dataset=ds, best_model=model[:-1])


def test_engine_status_report():
    res, ws = _engine_run()
    info = engine_info(res, ess_target=1000, eta_seconds=0)
    text = engine_status_report(dict(info, stage="correct", eta_seconds=420.0, converged=False))
    assert "exact     1,263 calls so far (fit 35, design 28, correction 1,200)" in text
    assert f"Kish ESS {res.ess:,.0f}" in text and f"k̂         {res.khat:.2f}" in text
    assert "ETA       about 7 min" in text and "running, not converged yet" in text
    assert f"weight ESS {res.ess:.0f} < 1000" in text
    done = engine_status_report(dict(info, ess_target=100))
    assert "verdict   targets met" in done and "ETA" not in done
    # a record claiming convergence against its own figures is not believed
    assert "NOT converged" in engine_status_report(dict(info, ess_target=1e6))
    early = engine_status_report({"stage": "fit"})
    assert "not yet known" in early and "not yet measurable" in early and "surrogate chain not run yet" in early
