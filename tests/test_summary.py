"""Marginal constraints, tables, figures and summary files (infer.analysis.marginals, infer.report).

References used below:
* scipy.stats (PyPI reference library): distributions' ppf/pdf, ``tstd``, ``mstats.mquantiles``.
* Asymptotic standard error of a sample quantile, sqrt(q(1−q)/N) / f(x_q): common practice (e.g. Stuart &
  Ord, Kendall's Advanced Theory of Statistics, vol. 1, §10.10; from memory). Draws here are independent.
* Two significant digits of an uncertainty: JCGM 100:2008 (GUM), §7.2.6 ("at most two significant digits";
  from memory) and common practice in cosmology papers.
"""
from __future__ import annotations

import os
import re
from types import SimpleNamespace

import matplotlib.image as mpimg
import numpy as np
import pytest
from scipy import stats

from infer.analysis import burnin, diagnostics, marginals
from infer.analysis.samples import Samples
from infer.config import Stopping
from infer.errors import UserError
from infer.report import figures as plots
from infer.report import rounding, summary, tables

STEPS, ENS, WALK = 400, 4, 25          # 40 000 independent draws


def _pack(cols: list[np.ndarray], steps=STEPS, ens=ENS, walk=WALK) -> np.ndarray:
    return np.stack(cols, axis=-1).reshape(steps, ens, walk, len(cols))


@pytest.fixture(scope="module")
def known():
    """Exact independent draws of known distributions, shaped like a chain."""
    rng = np.random.default_rng(20240611)
    n = STEPS * ENS * WALK
    mean, cov = np.array([0.5, -1.0]), np.array([[0.01, 0.006], [0.006, 0.04]])
    gauss = stats.multivariate_normal(mean, cov)
    skew = stats.lognorm(s=0.5)                                  # median 1, long right tail
    edge = stats.truncnorm(a=0.0, b=5.0, loc=0.0, scale=0.2)     # half-normal piled on 0, support (0, 1)
    edge_hi = stats.truncnorm(a=-5.0, b=0.0, loc=1.0, scale=0.2)  # piled on 1, support (0, 1)
    flat = stats.uniform(0.0, 1.0)
    g = gauss.rvs(size=n, random_state=rng)
    x = [g[:, 0], g[:, 1], skew.rvs(size=n, random_state=rng), edge.rvs(size=n, random_state=rng),
         edge_hi.rvs(size=n, random_state=rng), flat.rvs(size=n, random_state=rng)]
    names = ("g1", "g2", "skew", "edge", "edge_hi", "flat")
    log_post = gauss.logpdf(g) + skew.logpdf(x[2]) + edge.logpdf(x[3]) + edge_hi.logpdf(x[4])
    pos = _pack(x)
    derived = (pos[..., 0] + pos[..., 1])[..., None]
    s = Samples(names, ("g_sum",), pos, derived, log_post.reshape(STEPS, ENS, WALK),
                (log_post - 1.0).reshape(STEPS, ENS, WALK),
                tex={"g1": r"\gamma_1", "g2": r"\gamma_2", "skew": r"\sigma_{\rm sk}", "edge": r"\epsilon",
                     "edge_hi": r"\epsilon'", "flat": "f", "g_sum": r"\gamma_1+\gamma_2"},
                bounds={"g1": (0.0, 1.0), "g2": (-3.0, 1.0), "skew": (0.0, 20.0), "edge": (0.0, 1.0),
                        "edge_hi": (0.0, 1.0), "flat": (0.0, 1.0)},
                meta={"run": "known-distributions"})
    dists = {"g1": stats.norm(0.5, 0.1), "g2": stats.norm(-1.0, 0.2), "skew": skew, "edge": edge,
             "edge_hi": edge_hi, "flat": flat, "g_sum": stats.norm(-0.5, np.sqrt(0.01 + 0.04 + 2 * 0.006))}
    cons, info = marginals.constraints(s)
    return s, dists, {c.name: c for c in cons}, info


def test_burn_in_and_pooled_moments(known):
    s, _, cons, info = known
    # Independent draws have τ = 1 by definition (common practice), so 5τ burn-in is a handful of steps;
    # the number is the one rule's (burnin.choose): τ_max over every sampled and derived quantity,
    # the same burn-in the stopping rule uses.
    taus = [diagnostics.autocorr_time(s.column(n).reshape(STEPS, -1).T) for n in s.all_names]
    assert info["burn"] == diagnostics.burn_in(max(taus), STEPS, factor=burnin.BURN_FACTOR) <= 10
    from infer.sampling.stopping import assess
    assert info["burn"] == burnin.choose(s).burn == assess(s, Stopping()).burn
    assert info["ess_target"] == Stopping().ess_above and info["rhat_target"] == Stopping().rhat_below
    assert info["draws"] == (STEPS - info["burn"]) * ENS * WALK
    kept = s.after(info["burn"])
    for name, c in cons.items():
        x = kept.column(name).ravel()
        # scipy.stats / numpy as reference: mean, sd (ddof=1), Hyndman–Fan type-7 quantiles.
        assert c.mean == pytest.approx(np.mean(x), rel=1e-12, abs=1e-15)
        assert c.sd == pytest.approx(stats.tstd(x), rel=1e-10)
        ref = stats.mstats.mquantiles(x, prob=[0.5, 0.16, 0.84, 0.025, 0.975], alphap=1, betap=1)
        assert np.allclose([c.median, c.lo68, c.hi68, c.lo95, c.hi95], ref, rtol=0, atol=1e-12)


def test_intervals_cover_analytic_quantiles(known):
    _, dists, cons, info = known
    n = info["draws"]
    for name, c in cons.items():
        d = dists[name]
        for q, got in ((0.025, c.lo95), (0.16, c.lo68), (0.5, c.median), (0.84, c.hi68), (0.975, c.hi95)):
            truth = d.ppf(q)                                   # scipy.stats ppf as reference
            se = np.sqrt(q * (1 - q) / n) / d.pdf(truth)       # quantile standard error (see docstring)
            assert abs(got - truth) < 4.5 * se, (name, q, got, truth, se)
        assert abs(c.mean - d.mean()) < 4.5 * d.std() / np.sqrt(n)


def test_best_sample_is_highest_log_posterior(known):
    s, _, cons, info = known
    kept = s.after(info["burn"])
    i = np.unravel_index(np.argmax(kept.log_post), kept.log_post.shape)
    for name, c in cons.items():
        assert c.best == kept.column(name)[i]
    assert info["best"]["log_post"] == kept.log_post.max()


def test_one_sided_limits_detected_only_on_piled_edges(known):
    _, dists, cons, info = known
    n = info["draws"]
    kind, v = cons["edge"].limit
    se = np.sqrt(0.95 * 0.05 / n) / dists["edge"].pdf(dists["edge"].ppf(0.95))
    assert kind == "upper" and abs(v - dists["edge"].ppf(0.95)) < 4.5 * se   # scipy.stats truncnorm ppf
    kind, v = cons["edge_hi"].limit
    assert kind == "lower" and abs(v - dists["edge_hi"].ppf(0.05)) < 4.5 * se
    for name in ("g1", "g2", "skew", "flat", "g_sum"):
        assert cons[name].limit is None, name
    assert info["prior_dominated"] == ["flat"]


def test_no_limit_for_narrow_peak_near_an_edge():
    # A detection 3σ away from the prior edge (σ ≪ 5 % of the range) is an interval, not a limit;
    # a half-normal is a limit whatever its width. Reference draws from scipy.stats.
    rng = np.random.default_rng(5)
    near = stats.norm(0.031, 0.007).rvs(size=20000, random_state=rng)
    assert marginals.edge_limit(near, 0.01, 0.8) is None
    piled = stats.halfnorm(scale=0.002).rvs(size=20000, random_state=rng)
    assert marginals.edge_limit(piled, 0.0, 0.8)[0] == "upper"


def _latex_row(tex: str, label: str) -> str:
    return next(line for line in tex.splitlines() if line.startswith(label))


def test_latex_forms(known):
    _, dists, cons, info = known
    tex = tables.latex_table(list(cons.values()), info)
    assert r"\begin{tabular}" in tex and r"\end{tabular}" in tex and r"\usepackage" not in tex
    assert " & ".join(tables.LATEX_HEADINGS) + r" \\" in tex.splitlines()
    skew_row = _latex_row(tex, r"$\sigma_{\rm sk}$")
    m = re.search(r"\$([\d.]+)\^\{\+([\d.]+)\}_\{-([\d.]+)\}\$", skew_row)
    assert m, skew_row                                        # asymmetric form for the lognormal
    med, up, down = map(float, m.groups())
    d = dists["skew"]                                         # scipy.stats lognorm: 1, e^{0.497}−1, 1−e^{−0.497}
    assert med == pytest.approx(d.median(), abs=0.02)
    assert up == pytest.approx(d.ppf(0.84) - d.median(), abs=0.02)
    assert down == pytest.approx(d.median() - d.ppf(0.16), abs=0.02)
    g_row = _latex_row(tex, r"$\gamma_1$")
    m = re.search(r"\$(-?[\d.]+) \\pm ([\d.]+)\$", g_row)
    assert m, g_row                                           # symmetric form for the Gaussian
    assert float(m.group(1)) == pytest.approx(0.5, abs=0.005) and float(m.group(2)) == pytest.approx(0.10, abs=0.005)
    assert re.search(r"\$< 0\.\d+\$ \(95", _latex_row(tex, r"$\epsilon$")), "upper limit form"
    assert re.search(r"\$> 0\.\d+\$ \(95", _latex_row(tex, r"$\epsilon'$")), "lower limit form"


def test_markdown_table(known):
    _, _, cons, info = known
    md = tables.markdown_table(list(cons.values()), info, {"run": "known-distributions"})
    assert "Central intervals" in md and f"first {info['burn']} steps" in md and "**Converged**" in md
    assert "| " + " | ".join(tables.MARKDOWN_HEADINGS) + " |" in md
    assert tables.UNRELIABLE not in md                # 400 independent steps: τ = 1 is measurable
    assert md.count("\n| `") == len(cons)
    assert "one-sided 95 %" in md and tables.FLAG not in md
    # a row missing the ESS target gets the marker and the footnote
    strict = dict(info, ess_target=1e9)
    md2 = tables.markdown_table(list(cons.values()), strict, {})
    assert "**Not converged**" in md2 and md2.count(tables.FLAG) >= len(cons) + 1


@pytest.mark.parametrize("x, err, expected", [
    # two significant digits of the error, value to the same decimal place (GUM §7.2.6; common practice)
    (0.022370, 0.000150, r"0.02237 \pm 0.00015"),
    (67.36, 0.54, r"67.36 \pm 0.54"),
    (0.96491, 0.00421, r"0.9649 \pm 0.0042"),
    (1.2345, 0.0996, r"1.23 \pm 0.10"),            # the error rounds up to 0.10: one digit fewer
    (3.0445, 0.0135, r"3.045 \pm 0.014"),          # half away from zero on the decimal value
    (1234.56, 23.4, r"1235 \pm 23"),
    (1234.56, 234.0, r"1230 \pm 230"),
    (-0.00001, 0.5, r"0.00 \pm 0.50"),             # no "-0.00"
    (2.1e-9, 3.0e-11, r"(2.100 \pm 0.030) \times 10^{-9}"),
    (-4.0e-4, 3.04e-5, r"(-4.00 \pm 0.30) \times 10^{-4}"),
    (12345.0, 678.0, r"(1.235 \pm 0.068) \times 10^{4}"),
    (1.0, 0.0, "1"),
])
def test_format_value(x, err, expected):
    assert rounding.format_value(x, err) == expected


def test_format_value_plain_text():
    assert rounding.format_value(67.36, 0.54, tex=False) == "67.36 ± 0.54"
    assert rounding.format_value(2.1e-9, 3.0e-11, tex=False) == "(2.100 ± 0.030) ×10^-9"
    assert rounding.format_asym(1.0, 0.644, 0.392) == "1.00^{+0.64}_{-0.39}"


def test_credible_levels_match_gaussian_hpd():
    # For a 2-D standard normal the mass-m highest-density region is the disc r² ≤ χ²₂.ppf(m), whose
    # boundary density is (1 − m)/2π (scipy.stats.chi2 as reference).
    g = np.linspace(-6, 6, 601)
    xx, yy = np.meshgrid(g, g)
    dens = np.exp(-0.5 * (xx**2 + yy**2)) / (2 * np.pi)
    for m, level in zip((0.68, 0.95), plots.credible_levels(dens, (0.68, 0.95))):
        r2 = stats.chi2(2).ppf(m)
        assert level == pytest.approx(np.exp(-0.5 * r2) / (2 * np.pi), rel=0.01)


def test_burn_checks(known):
    s = known[0]
    assert marginals.constraints(s, burn=100)[1]["burn"] == 100
    for bad in (-1, STEPS, 2.5):
        with pytest.raises(UserError):
            marginals.constraints(s, burn=bad)


# -- files ------------------------------------------------------------------------------------------


def _small_run(seed=3):
    rng = np.random.default_rng(seed)
    steps, ens, walk = 120, 2, 8
    x = np.empty((steps, ens, walk, 3))
    z = rng.standard_normal((ens, walk, 3)) * 3
    for t in range(steps):                     # AR(1) walkers with a visible burn-in
        z = 0.8 * z + 0.6 * rng.standard_normal(z.shape)
        x[t] = z
    pos = np.stack([0.3 + 0.05 * x[..., 0], 2.0 + 0.3 * x[..., 1], np.abs(0.1 * x[..., 2])], axis=-1)
    lp = -0.5 * np.sum(x**2, axis=-1)
    return Samples(("a", "b", "c"), ("ab",), pos, (pos[..., 0] * pos[..., 1])[..., None], lp, lp,
                   tex={"a": r"\omega_x", "b": "n_y", "c": r"\tau_z", "ab": r"\omega_x n_y"},
                   bounds={"a": (-5, 5), "b": (-5, 10), "c": (0, 1)}, meta={"run": "small"})


def _fake_dataset(seed=4):
    rng = np.random.default_rng(seed)
    lo = np.tile(np.arange(30, 1000, 50), 2)
    kind = np.array(["TT"] * 20 + ["EE"] * 20)
    eff = lo + 24.5
    model = np.where(kind == "TT", 3000 * np.exp(-eff / 600), 20 + 10 * np.sin(eff / 60))
    sig = np.where(kind == "TT", 40.0, 1.0)
    cov = np.diag(sig**2)
    return (SimpleNamespace(kind=kind, ell_lo=lo, ell_hi=lo + 49, ell_eff=eff, value=model + sig * rng.standard_normal(40),
                            covariance=cov, to_dl=np.ones(40), spectra=("TT", "EE"), experiment="Fictional Array"),
            model)


@pytest.mark.slow
def test_write_summary_files(tmp_path):
    s = _small_run()
    ds, model = _fake_dataset()
    out = tmp_path / "deep" / "summary"
    out.mkdir(parents=True)
    keep = out / "notes.txt"
    keep.write_text("mine")
    before = os.stat(keep).st_mtime_ns
    for _ in range(2):                                        # a second run replaces its own files
        paths = summary.write_summary(s, out, dataset=ds, best_model=model)
        assert set(p.name for p in paths.values()) == {"constraints.md", "constraints.tex", "triangle.png",
                                                       "traces.png", "convergence.png", "bandpowers.png", "residuals.png"}
        for p in paths.values():
            assert p.is_file() and p.stat().st_size > 0
            if p.suffix == ".png":
                img = mpimg.imread(p)
                assert img.ndim == 3 and min(img.shape[:2]) > 200
    assert keep.read_text() == "mine" and os.stat(keep).st_mtime_ns == before
    assert not [p for p in out.iterdir() if p.name.startswith(".") and p.name != summary.MANIFEST]
    # a file written by a summary and edited since is not replaced
    paths["markdown"].write_text(paths["markdown"].read_text() + "\nmy edits\n")
    with pytest.raises(UserError, match="constraints.md"):
        summary.write_summary(s, out)
    assert paths["markdown"].read_text().endswith("my edits\n")


def test_write_summary_refuses_foreign_files(tmp_path):
    s = _small_run()
    (tmp_path / "constraints.tex").write_text("% the user's own table\n")
    with pytest.raises(UserError, match="constraints.tex"):
        summary.write_summary(s, tmp_path)
    assert (tmp_path / "constraints.tex").read_text() == "% the user's own table\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["constraints.tex"]   # nothing else written
    with pytest.raises(UserError, match="not a directory"):
        summary.write_summary(s, tmp_path / "constraints.tex")
    ds, model = _fake_dataset()
    with pytest.raises(UserError, match="best-sample model"):
        summary.write_summary(s, tmp_path / "new", dataset=ds, best_model=model[:-1])


def test_convergence_history_prefixes():
    s = _small_run()
    h = plots.convergence_history(s, Stopping(), n_points=6)
    assert list(h["step"]) == [20, 40, 60, 80, 100, 120]
    # each point is what the stopping rule says of the run up to that step (one burn-in rule)
    from infer.sampling.stopping import assess
    last = assess(s, Stopping())
    assert h["rhat_max"][-1] == last.rhat_max
    assert h["ess_bulk_min"][-1] == last.ess_bulk_min and h["tau_max"][-1] == last.tau_max
    # AR(1) walkers with ρ = 0.8 have τ = 9 (Sokal 1997): 120 steps < 50 τ, never trusted
    assert not h["trusted"].any()


def test_plots_leave_matplotlib_global_state_alone(tmp_path):
    import matplotlib
    before = dict(matplotlib.rcParams)
    backend = matplotlib.get_backend()
    plots.convergence(plots.convergence_history(_small_run(), n_points=4), tmp_path / "c.png")
    plots.render(plots.traces_figure(_small_run(), 10))
    assert dict(matplotlib.rcParams) == before and matplotlib.get_backend() == backend
