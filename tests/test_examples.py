"""The example run files (configs/example_*.toml) and the one-sided limit their Σm_ν posterior needs.

References: every example must load and build its posterior as the demo does (no Boltzmann call; a slow
test makes one at the guess). The upper-limit check runs the exactly solvable template model of
configs/quick.toml, whose posterior is Gaussian in closed form (linear model, Gaussian likelihood and
prior: the conjugate normal result, common practice), with the lower prior edge of a_1 put at its
posterior mean: the marginal of a_1 is then exactly a normal truncated to [edge, 3], and the reported 95 %
upper limit must match scipy.stats.truncnorm's 0.95 quantile within its Monte Carlo error
(se = √(q(1−q)/ESS) / p(x_q), the asymptotic standard error of a sample quantile, e.g. Stuart & Ord,
Kendall's Advanced Theory of Statistics, vol. 1, §10.10, cited from memory).
"""
from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np
import pytest

from infer import config
from infer.parameters import support

ROOT = Path(__file__).resolve().parents[1]
CONFIGS = ROOT / "configs"
#: example file → (extension parameter, its prior support, its value in the Kestrel mock)
EXAMPLES = {
    "example_mnu.toml": ({"sum_mnu_eV": (0.0, 1.0)}, {"sum_mnu_eV": 0.06}),
    "example_neff.toml": ({"n_eff": (1.5, 5.5)}, {"n_eff": 3.044}),
    "example_alens.toml": ({"a_lens": (0.0, 3.0)}, {"a_lens": 1.0}),
    "example_w0wa.toml": ({"w0": (-2.5, 0.0), "wa": (-3.0, 2.0)}, {"w0": -1.0, "wa": 0.0}),
    "example_r.toml": ({"r": (0.0, 1.0)}, {"r": 0.0}),
}
LCDM = ("omega_b", "omega_c", "theta_star_100", "ln_As_1e10", "n_s", "calibration")


def _refuse_boltzmann(monkeypatch):
    from infer.theory import camb as camb_backend

    def refuse(self, params):
        raise AssertionError("a Boltzmann call was made")
    monkeypatch.setattr(camb_backend.CambTheory, "compute", refuse)


@pytest.mark.parametrize("name", sorted(EXAMPLES))
def test_example_loads_and_builds_its_posterior_without_a_boltzmann_call(name, monkeypatch):
    from infer.model.posterior import Posterior
    cfg = config.load(CONFIGS / name)
    priors, fiducial = EXAMPLES[name]
    demo = config.load(CONFIGS / "kestrel_demo.toml")
    assert cfg.dataset == demo.dataset                                # the demo's data and cuts
    assert cfg.sampling.engine == "surrogate" and cfg.theory["code"] == "camb"
    assert cfg.theory["accuracy"] == demo.theory["accuracy"]
    sampled = {p.name: p for p in cfg.sampled}
    assert set(sampled) == set(LCDM) | set(priors)
    for param, bounds in priors.items():
        p = sampled[param]
        assert support(p.prior) == bounds and p.prior.kind == "uniform"
        assert bounds[0] <= fiducial[param] < bounds[1]                # the mock's value is in the prior
        assert p.guess == fiducial[param] or fiducial[param] == bounds[0]   # (r: the mock sits on the edge)
    assert cfg.fixed == {"tau": 0.055}
    assert cfg.name == Path(name).stem.replace("_", "-") and Path(cfg.chain_path).name == f"{cfg.name}.h5"
    _refuse_boltzmann(monkeypatch)
    post = Posterior(cfg)
    assert set(priors) <= set(post.theory.inputs)
    assert post.like.n == 147 and post.like.kinds == ("TT", "TE", "EE")
    assert math.isfinite(post.priors.logpdf(np.array([p.guess for p in cfg.sampled])))


def test_the_neutrino_mass_prior_starts_at_its_physical_edge():
    p = {q.name: q for q in config.load(CONFIGS / "example_mnu.toml").sampled}["sum_mnu_eV"]
    assert support(p.prior)[0] == 0.0


@pytest.mark.camb
@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(EXAMPLES))
def test_example_posterior_is_finite_at_its_guess(name):
    from infer.model.posterior import Posterior
    cfg = config.load(CONFIGS / name)
    post = Posterior(cfg)
    lp, blob, reason = post(np.array([p.guess for p in cfg.sampled]))
    assert reason is None and math.isfinite(lp)
    # at the mock's own cosmology the χ² is that of the noise realisation: near N = 147 (±√(2N) ≈ 17)
    assert abs(blob[-1] - 147) < 4 * math.sqrt(2 * 147)


# -- a one-sided limit on a posterior piled up at a prior edge ---------------------------------------------
def _closed_form_posterior(cfg):
    """Mean and covariance of the template model's posterior with Gaussian priors folded in (conjugate
    normal result; uniform priors far from the mass are flat)."""
    from infer.model.posterior import load_data
    from infer.theory.templates import TemplateTheory
    data = load_data(cfg)
    A = TemplateTheory(data.ell_max_needed, {}).design_matrix(data.kind, data.window_ell, data.window)
    cinv = np.linalg.inv(np.asarray(data.covariance))
    prec, rhs = A.T @ cinv @ A, A.T @ cinv @ np.asarray(data.value)
    for i, p in enumerate(cfg.sampled):
        if p.prior.kind != "uniform":
            mu, sd = p.prior.args[:2]
            prec[i, i] += 1.0 / sd**2
            rhs[i] += mu / sd**2
    cov = np.linalg.inv(prec)
    return cov @ rhs, cov


@pytest.mark.slow
def test_upper_limit_of_a_marginal_piled_on_a_prior_edge_matches_the_truncated_normal(tmp_path):
    from scipy import stats
    from infer.analysis import marginals
    from infer.cli import main
    from infer.store.chainfile import ChainStore
    text = (CONFIGS / "quick.toml").read_text()
    text = text.replace('file = "data/quick_bandpowers.h5"', f'file = "{CONFIGS / "data" / "quick_bandpowers.h5"}"')
    plain = tmp_path / "plain.toml"
    plain.write_text(text)
    mean, cov = _closed_form_posterior(config.load(plain))
    mu, sd = mean[0], math.sqrt(cov[0, 0])
    edge = round(float(mu), 4)                        # prior edge at the posterior peak: a half-normal marginal
    text = text.replace("prior = { uniform = [0.0, 3.0] }\nguess = 1.0\nspread = 0.05\ntex = 'a_1'",
                        f"prior = {{ uniform = [{edge}, 3.0] }}\nguess = {edge + sd:.6f}\nspread = {sd / 2:.6f}\n"
                        "tex = 'a_1'", 1)
    assert f"uniform = [{edge}, 3.0]" in text
    text += f'\n[output]\nchain = "{tmp_path / "edge.h5"}"\nsummary = "{tmp_path / "edge"}"\n'
    run = tmp_path / "edge.toml"
    run.write_text(text)
    assert main(["--quiet", "run", str(run), "--summarize"]) == 0

    cons, info = marginals.constraints(ChainStore(str(tmp_path / "edge.h5")).read().samples)
    a1 = next(c for c in cons if c.name == "a_1")
    truth = stats.truncnorm((edge - mu) / sd, (3.0 - mu) / sd, loc=mu, scale=sd)   # scipy.stats reference
    q95 = truth.ppf(0.95)
    assert a1.limit is not None and a1.limit[0] == "upper"
    ess = min(a1.ess_bulk, a1.ess_tail)
    se = math.sqrt(0.95 * 0.05 / ess) / truth.pdf(q95)
    assert abs(a1.limit[1] - q95) < 4.5 * se, (a1.limit, q95, se, ess)
    for c in cons:                                    # the others are ordinary two-sided intervals
        if c.sampled and c.name != "a_1":
            assert c.limit is None, c.name
    md = (tmp_path / "edge" / "constraints.md").read_text()
    row = next(line for line in md.splitlines() if "`a_1`" in line)
    assert re.search(r"< [\d.]+ \(one-sided 95 %\)", row), row
