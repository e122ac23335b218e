"""The best sample and its fit line: one definition (the kept draw with the highest ln posterior, after
burn-in) for the tables, the band-power figure and the χ²/PTE line, and a χ² that equals an independent
computation.

References: ``scipy.stats.multivariate_normal.logpdf`` (PyPI reference library) gives
−2 ln L = χ² + ln det(2πC) for Gaussian band powers; ``scipy.stats.chi2.sf`` the PTE.
"""
from __future__ import annotations

import re

import numpy as np
import pytest
from scipy import stats

from infer import config
from infer.analysis import burnin, marginals
from infer.analysis.samples import Samples
from infer.cli import main
from infer.model.posterior import Posterior
from infer.report.summary import summarize_run
from infer.store.chainfile import ChainStore


def test_best_sample_ignores_the_burn_in():
    rng = np.random.default_rng(0)
    pos = rng.standard_normal((40, 2, 4, 1))
    lp = -0.5 * pos[..., 0] ** 2
    lp[3, 1, 2] = 10.0                         # the highest ln P of the whole chain, inside the burn-in
    lp[30, 0, 1] = 5.0                         # the highest of the kept draws
    s = Samples(("x",), (), pos, np.zeros((40, 2, 4, 0)), lp, lp)
    assert marginals.best_index(s, 0) == (3, 1, 2)
    assert marginals.best_index(s, 10) == (30, 0, 1)
    cons, info = marginals.constraints(s, burn=10)
    assert info["best"]["step"] == 30 and cons[0].best == pos[30, 0, 1, 0]


@pytest.mark.slow
def test_summary_fit_line_is_the_kept_best_sample_and_matches_scipy(write_config):
    cfg_path, chain = write_config(steps=60, check_every=20)
    assert main(["--quiet", "run", str(cfg_path)]) == 0
    state = ChainStore(str(chain)).read()
    cfg = config.load(str(cfg_path))
    text = summarize_run(state, cfg, str(chain), out=str(chain.parent / "summary"))
    # independent: the one burn-in rule, the kept draw with the highest ln P, scipy's Gaussian
    s = state.samples
    burn = burnin.choose(s, tau_multiple=cfg.stopping.tau_multiple).burn
    kept = s.log_post[burn:]
    i = np.unravel_index(np.argmax(kept), kept.shape)
    post = Posterior(cfg)
    model = post.model_bands(s.position[burn + i[0], i[1], i[2]])
    cov = np.asarray(post.data.covariance, float)
    logdet = np.linalg.slogdet(2 * np.pi * cov)[1]
    chi2 = -2 * stats.multivariate_normal(model, cov).logpdf(post.data.value) - logdet
    dof = post.like.n - len(s.names)
    m = re.search(r"best sample: χ² = ([\d.]+) for (\d+) bands \((\d+) dof.*PTE = ([\d.]+)", text)
    assert m, text
    assert float(m.group(1)) == pytest.approx(chi2, abs=0.051)
    assert int(m.group(2)) == post.like.n and int(m.group(3)) == dof
    assert float(m.group(4)) == pytest.approx(stats.chi2.sf(chi2, dof), abs=5e-4)
    md = (chain.parent / "summary" / "constraints.md").read_text()
    assert f"Fit of the best sample: χ² = {chi2:.1f}" in md
    assert f"step {burn + i[0]}, ensemble {i[1]}, walker {i[2]}" in md
