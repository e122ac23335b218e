"""Profile likelihoods (infer.fit.profile, ``infer profile``): against the closed form of the linear-Gaussian model.

References used below:
* The linear-Gaussian model (Gelman et al. 2013, *Bayesian Data Analysis*, 3rd ed., §14.2): with flat priors
  the likelihood of the template amplitudes is Gaussian with mean θ̂ = (AᵀC⁻¹A)⁻¹AᵀC⁻¹d and covariance
  Σ = (AᵀC⁻¹A)⁻¹. Minimising −2 ln L over the other parameters gives the profile
  −2 ln L_p(ψ) = −2 ln L(θ̂) + (ψ − ψ̂)²/Σ_ψψ, a parabola of curvature 1/σ² with σ² = Σ_ψψ (the parameter's
  marginal variance of the likelihood), and the minimising other parameters lie on the conditional-mean
  line φ̂ + Σ_φψ (ψ − ψ̂)/Σ_ψψ (the Gaussian's conditional mean; common practice).
* The Δχ² = 1 and 3.84 intervals are ψ̂ ± σ and ψ̂ ± √3.84 σ (Wilks 1938, Ann. Math. Stat. 9, 60; exact for
  a Gaussian likelihood; common practice).
* scipy.stats.multivariate_normal (PyPI reference library) for the value of −2 ln L at the optimum.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from conftest import analytic_posterior
from infer import config
from infer import data as datasets
from infer.cli import main
from infer.errors import UserError
from infer.fit import profile as prof
from infer.report import profile_record as profrec
from infer.theory.templates import NAMES

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def quick_cfg(tmp_path_factory, quick_data):
    from conftest import quick_config_text
    d = tmp_path_factory.mktemp("profile")
    path = d / "run.toml"
    path.write_text(quick_config_text(quick_data, d / "chains" / "run.h5", steps=300))
    return config.load(path)


@pytest.mark.parametrize("name", ["a_2", "a_3"])
def test_profile_is_the_closed_form_parabola(quick_cfg, quick_data, name):
    k = NAMES.index(name)
    mean, cov = analytic_posterior(quick_data)                           # BDA §14.2
    sigma = math.sqrt(cov[k, k])
    res = prof.profile(quick_cfg, name, points=15, workers=0, progress=False)
    closed = (res.grid - mean[k]) ** 2 / cov[k, k]
    assert res.converged.all()
    np.testing.assert_allclose(res.dchi2, closed, atol=1e-6)
    psi, s = res.parabola()
    assert psi == pytest.approx(mean[k], abs=1e-6 * sigma) and s == pytest.approx(sigma, rel=1e-6)
    one, two = res.intervals()
    assert (one.lower, one.upper) == pytest.approx((mean[k] - sigma, mean[k] + sigma), abs=1e-6 * sigma)
    r = math.sqrt(3.84)
    assert (two.lower, two.upper) == pytest.approx((mean[k] - r * sigma, mean[k] + r * sigma), abs=1e-6 * sigma)
    assert not (one.lower_edge or one.upper_edge or two.lower_edge or two.upper_edge)
    # the other parameters follow the Gaussian's conditional-mean line
    others = [i for i in range(4) if i != k]
    line = mean[others][None, :] + np.outer(res.grid - mean[k], cov[others, k] / cov[k, k])
    np.testing.assert_allclose(res.points[:, others], line, atol=1e-5 * np.sqrt(np.diag(cov))[others].max())
    np.testing.assert_allclose(res.points[:, k], res.grid)
    # −2 ln L at the minimum from scipy.stats
    data = datasets.load(quick_data)
    from infer.theory.templates import TemplateTheory
    design = TemplateTheory(data.ell_max_needed, {}).design_matrix(data.kind, data.window_ell, data.window)
    ref = -2 * stats.multivariate_normal(design @ mean, data.covariance).logpdf(data.value)
    assert res.minimum == pytest.approx(ref, rel=1e-9)


def test_surrogate_proposals_give_the_same_profile_with_fewer_grid_calls(quick_cfg, quick_data):
    exact = prof.profile(quick_cfg, "a_1", points=11, workers=0, progress=False)
    proposed = prof.profile(quick_cfg, "a_1", points=11, workers=0, progress=False, surrogate=prof.train_surrogate())
    np.testing.assert_allclose(proposed.dchi2, exact.dchi2, atol=1e-6)
    assert proposed.surrogate["design_calls"] > 0
    # a proposal on the optimum is confirmed by one fresh Jacobian: 1 + 2 (P − 1) exact calls per point
    assert (proposed.calls == 1 + 2 * 3).all() and proposed.calls.sum() < exact.calls.sum()
    assert np.all(np.abs(proposed.surrogate_error) < 1e-6)        # linear model: the surrogate is exact


def test_interval_at_a_prior_bound_and_at_the_grid_edge(tmp_path, quick_data):
    from conftest import quick_config_text
    mean, cov = analytic_posterior(quick_data)
    sigma = math.sqrt(cov[1, 1])
    lo = float(np.round(mean[1] - 0.5 * sigma, 4))                   # the prior cuts the 1σ interval
    priors = {n: "{ uniform = [0.0, 3.0] }" for n in NAMES}
    priors["a_2"] = f"{{ uniform = [{lo}, 3.0] }}"
    path = tmp_path / "run.toml"
    path.write_text(quick_config_text(quick_data, tmp_path / "c.h5", priors=priors))
    cfg = config.load(path)
    res = prof.profile(cfg, "a_2", points=9, workers=0, progress=False)
    one = res.intervals()[0]
    assert one.lower_edge == "prior bound" and one.lower == pytest.approx(lo, abs=1e-6)
    assert one.upper_edge == "" and one.upper == pytest.approx(mean[1] + sigma, abs=1e-5 * sigma)
    assert "prior bound" in profrec.table(res)
    narrow = prof.profile(cfg, "a_2", points=5, span=(mean[1] - 0.2 * sigma, mean[1] + 0.5 * sigma), workers=0,
                          progress=False)
    assert [(iv.lower_edge, iv.upper_edge) for iv in narrow.intervals()] == [("grid edge", "grid edge")] * 2


def test_interval_crossings_of_a_sampled_parabola():
    x = np.linspace(-2.1, 5.0, 8)                # coarse and off-centre: the crossings are between points
    d = ((x - 1.3) / 0.7) ** 2
    # measured from the true minimum, the signed-root interpolation is exact for a parabola
    for level in (1.0, 3.84):
        iv = prof.interval(x, d, level)
        r = 0.7 * math.sqrt(level)
        assert (iv.lower, iv.upper) == pytest.approx((1.3 - r, 1.3 + r), abs=1e-12)
        assert iv.lower_edge == iv.upper_edge == ""
    # linear interpolation in Δχ² itself is off by 2.5 % of σ on this grid: the check has teeth
    j = int(np.searchsorted(x, 2.0))
    assert x[j - 1] < 2.0 < x[j]
    naive = x[j - 1] + (1.0 - d[j - 1]) / (d[j] - d[j - 1]) * (x[j] - x[j - 1])
    assert abs(naive - 2.0) > 0.01


def test_bad_input_is_one_line_before_any_theory_call(quick_cfg, tmp_path, capsys):
    out = tmp_path / "out"
    for argv, words in (
            (["a_9"], "no sampled parameter 'a_9'"),
            (["a_2", "--range", "-1", "2"], "outside its prior support [0, 3]"),
            (["a_2", "--range", "2", "1"], "LO < HI"),
            (["a_2", "--points", "2"], "must be >= 3")):
        code = main(["profile", quick_cfg.path, *argv, "--out", str(out)])
        err = capsys.readouterr().err
        assert code == 2 and words in err and len(err.strip().splitlines()) == 1, err
        assert "fit:" not in err                          # no fit was started (no theory call)
    assert not out.exists() or not any(out.iterdir())
    with pytest.raises(UserError, match="no sampled parameter"):
        prof.profile(quick_cfg, "nope", workers=0)


@pytest.mark.slow
def test_command_writes_table_figure_and_record_and_protects_them(quick_cfg, tmp_path, capsys):
    chain = tmp_path / "chain.h5"
    assert main(["run", quick_cfg.path, "--chain", str(chain), "--steps", "300"]) == 0
    out = tmp_path / "prof"
    assert main(["profile", quick_cfg.path, "a_3", "--points", "9", "--chain", str(chain), "--out", str(out)]) == 0
    files = profrec.output_paths(out, "a_3")
    text = files["table"].read_text(encoding="utf-8")
    assert "Δχ² ≤ 1" in text and "marginal 68 % equal-tailed interval (chain)" in text
    rec = profrec.read_record(files["record"])
    assert rec["parameter"] == "a_3" and len(rec["grid"]) == 9 and rec["converged"].all()
    with open(files["figure"], "rb") as fh:
        assert fh.read(8) == b"\x89PNG\r\n\x1a\n"
    capsys.readouterr()
    # never overwritten without --replace; with it only our own unchanged files
    assert main(["profile", quick_cfg.path, "a_3", "--points", "9", "--out", str(out)]) == 2
    assert "already exists" in capsys.readouterr().err
    assert main(["profile", quick_cfg.path, "a_3", "--points", "9", "--out", str(out), "--replace"]) == 0
    files["table"].write_text("my notes\n", encoding="utf-8")
    assert main(["profile", quick_cfg.path, "a_3", "--points", "9", "--out", str(out), "--replace"]) == 2
    assert "changed since" in capsys.readouterr().err
    assert files["table"].read_text(encoding="utf-8") == "my notes\n"


def test_figure_shows_the_profile_beside_the_marginal(quick_cfg):
    from infer.analysis.samples import Samples
    from infer.report.figures.profile import profile_figure
    res = prof.profile(quick_cfg, "a_4", points=7, workers=0, progress=False)
    rng = np.random.default_rng(3)
    mean = res.parabola()[0]
    g = rng.normal(mean, res.best_sigma, size=(200, 1, 20, 1))
    z = np.zeros((200, 1, 20))
    s = Samples(("a_4",), (), g, np.zeros((200, 1, 20, 0)), z, z, tex={"a_4": "a_4"})
    fig = profile_figure(res, s)
    ax, bx = fig.axes[:2]
    drawn = [ln for ln in ax.lines if ln.get_marker() == "o"][0]
    np.testing.assert_allclose(drawn.get_xydata(), np.c_[res.grid, res.dchi2])
    # between the points the curve is what the intervals read: for this Gaussian profile, the parabola itself
    curve = max((ln for ln in ax.lines if ln.get_color() == drawn.get_color()), key=lambda ln: len(ln.get_xdata()))
    xs, ys = curve.get_data()
    sigma2 = res.parabola()[1] ** 2
    np.testing.assert_allclose(ys, (xs - mean) ** 2 / sigma2, atol=1e-6)
    assert bx.get_xlabel() == "$a_4$"


def _cheap_demo(tmp_path) -> Path:
    """The Kestrel demo run file, made cheaper: CAMB accuracy "fast", bands to ℓ = 1000, ω_b and n_s fixed
    at the demo's guesses (4 sampled parameters: ω_c, 100θ_*, ln A_s, calibration)."""
    import re
    text = (ROOT / "configs" / "kestrel_demo.toml").read_text(encoding="utf-8")
    text = text.replace('accuracy = "standard"', 'accuracy = "fast"').replace("ell_max = 1500", "ell_max = 1000")
    text = text.replace('file = "data/', f'file = "{ROOT / "configs" / "data"}/')
    text = re.sub(r'chain = "[^"]*"', f'chain = "{tmp_path / "demo.h5"}"', text)
    for name, value in (("omega_b", 0.0224), ("n_s", 0.965)):
        text = re.sub(rf"\[parameters\.{name}\]\n(?:[^\[\n][^\n]*\n)*", f"[parameters.{name}]\nvalue = {value}\n\n", text)
    path = tmp_path / "demo.toml"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.mark.camb
def test_demo_profile_minimum_is_the_best_fit(tmp_path):
    """CAMB (cheap setting, `_cheap_demo`): 3 grid points of 100θ_* within ±1.5 starting spreads (≈ 1.5σ)."""
    cfg = config.load(_cheap_demo(tmp_path))
    p = next(q for q in cfg.sampled if q.name == "theta_star_100")
    res = prof.profile(cfg, p.name, points=3, span=(p.guess - 1.5 * p.spread, p.guess + 1.5 * p.spread),
                       mode="posterior", workers=cfg.sampling.workers, starts=1, progress=False)
    psi, s = res.parabola()
    print(f"\ndemo profile of {p.name}: minimum {psi:.6g}, best fit {res.best[p.name]:.6g} ± {res.best_sigma:.3g}, "
          f"σ from curvature {s:.3g}, Δχ² {np.round(res.dchi2, 3)}, {res.total_calls} exact calls, {res.seconds:.0f} s")
    assert res.converged.all()
    assert abs(psi - res.best[p.name]) < 0.1 * res.best_sigma       # the profile's minimum is the best fit
    assert res.minimum >= res.best_neg2 - 0.05                        # no grid point below it (CAMB noise floor)
    assert s == pytest.approx(res.best_sigma, rel=0.1)                # curvature ≈ the Laplace σ (near-Gaussian)


@pytest.mark.slow
def test_a_surrogate_engine_chain_lends_its_surrogate_and_its_weighted_marginal(tmp_path, quick_data, capsys):
    from test_surrogate_run import engine_config
    from infer.fit.bands import BandModelFactory
    path, chain = engine_config(tmp_path, quick_data, ess=300)
    assert main(["--quiet", "run", str(path)]) == 0
    cfg = config.load(path)
    model = BandModelFactory(cfg)()
    sp = prof.surrogate_from_chain(cfg, chain, model)            # refitted from the stored exact calls
    assert sp.info["source"].startswith("rebuilt from") and sp.calls == 0
    res = prof.profile(cfg, "a_2", points=7, workers=0, progress=False, surrogate=sp, model=model)
    mean, cov = analytic_posterior(quick_data)                    # BDA §14.2
    np.testing.assert_allclose(res.dchi2, (res.grid - mean[1]) ** 2 / cov[1, 1], atol=1e-6)
    assert (res.calls == 1 + 2 * 3).all()                         # every proposal confirmed by one Jacobian
    out = tmp_path / "prof"
    assert main(["profile", str(path), "a_2", "--points", "7", "--chain", str(chain), "--out", str(out)]) == 0
    text = (out / "profile-a_2.md").read_text(encoding="utf-8")
    assert "rebuilt from" in text and "marginal 68 % equal-tailed interval (chain)" in text
    # a chain of another posterior is refused, before any theory call
    other = tmp_path / "other.toml"
    other.write_text(path.read_text().replace("prior = { uniform = [0.0, 3.0] }", "prior = { uniform = [0.0, 2.9] }", 1))
    capsys.readouterr()
    assert main(["profile", str(other), "a_2", "--chain", str(chain), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "another posterior" in err and "fit:" not in err
