"""The posterior's bookkeeping: names, blobs and the demo run file."""
from __future__ import annotations

from pathlib import Path

from infer import config
from infer.model.posterior import Posterior

DEMO = Path(__file__).resolve().parent.parent / "configs" / "kestrel_demo.toml"


def test_demo_run_file_is_valid_and_names_are_unique():
    # Builds CAMB's parameter structure but makes no Boltzmann call.
    cfg = config.load(DEMO)
    post = Posterior(cfg)
    names = post.names + post.derived_names
    assert len(set(names)) == len(names)
    # θ_* is sampled, so H0 is derived and θ_* is not repeated among the derived values.
    assert "theta_star_100" in post.names and "theta_star_100" not in post.derived_names
    assert "H0" in post.derived_names and "chi2" in post.derived_names
    assert post.blob_names == ("log_like",) + post.derived_names
    assert post.like.n == 147 and post.data.experiment == "Kestrel"


# -- the library functions behind the CLI (issue 8, item 5) ---------------------------------------------
def _quick_posterior(write_config, **options):
    cfg_path, _ = write_config(**options)
    return config.load(cfg_path)


def test_factory_pickles_compares_equal_and_builds_the_same_posterior(write_config):
    import pickle

    import numpy as np

    from infer.model.posterior import PosteriorFactory
    cfg = _quick_posterior(write_config)
    f = PosteriorFactory(cfg)
    g = pickle.loads(pickle.dumps(f))
    assert g == f                                        # an MPI rank keeps what it built for an equal factory
    x = np.array([p.guess for p in cfg.sampled])
    a, b = f()(x), g()(x)
    assert a[0] == b[0] and np.array_equal(a[1], b[1])


def test_fit_quality_and_the_likelihood_normalisation_against_scipy(write_config):
    """ln L = ln N(d; m, C) (scipy.stats.multivariate_normal), χ² per spectrum block with its own
    covariance block, PTE from scipy.stats.chi2."""
    import numpy as np
    from scipy import stats
    cfg = _quick_posterior(write_config)
    post = Posterior(cfg)
    x = np.array([p.guess for p in cfg.sampled]) * 1.01
    model, fit = post.fit_quality(x)
    d, cov = post.data.value, post.data.covariance
    lp, blob, _ = post(x)
    assert np.isclose(blob[0], stats.multivariate_normal(model, cov).logpdf(d), rtol=1e-10, atol=0)
    r = d - model
    assert np.isclose(fit.chi2, r @ np.linalg.solve(cov, r), rtol=1e-10) and fit.chi2 == blob[-1]
    assert fit.n_bins == len(d) and fit.dof == len(d) - len(post.names)
    assert np.isclose(fit.pte, stats.chi2.sf(fit.chi2, fit.dof), rtol=1e-12)
    for kind, (c2, n) in fit.by_kind.items():
        rows = post.data.kind == kind
        sub = np.asarray(cov)[np.ix_(rows, rows)]
        assert n == rows.sum() and np.isclose(c2, r[rows] @ np.linalg.solve(sub, r[rows]), rtol=1e-10)


def test_labels_provenance_and_timing(write_config):
    import json

    import numpy as np

    from infer.model import provenance
    from infer.model.timing import time_posterior
    cfg = _quick_posterior(write_config)
    post = Posterior(cfg)
    labels = post.labels()
    assert labels["a_1"] == "a_1" and labels["a_sum"] == r"\Sigma a" and labels["chi2"] == r"\chi^2"
    assert set(labels) >= set(post.names) | set(post.derived_names)
    rec = provenance.record(cfg, post)
    assert rec["dataset_sha256"] == post.data.sha256 and rec["config_text"] == cfg.text
    assert json.loads(rec["versions"])["numpy"] == np.__version__
    t = time_posterior(post, np.array([p.guess for p in cfg.sampled]), 2)
    assert t["calls"] == 2 and t["theory_s"] > 0 and t["likelihood_s"] > 0
    assert np.isclose(t["fraction"], t["likelihood_s"] / t["theory_s"])
    import pytest
    with pytest.raises(ValueError):
        time_posterior(post, np.ones(4), 0)


def test_nuisance_terms_against_their_definition(write_config):
    """m = c² (W D + A F) with F the window-averaged (ℓ/3000)² on TT bands only."""
    import numpy as np

    from infer.model.nuisance import NUISANCE
    cfg = _quick_posterior(write_config)
    post = Posterior(cfg)
    assert NUISANCE == {"calibration": 1.0, "fg_tt_amp": 0.0}
    spectra = post.theory.compute({n: 1.0 for n in post.theory.inputs})
    base = post.like.model(spectra)
    data = post.data
    ell = np.asarray(data.window_ell, float)
    f = np.where(data.kind == "TT", data.window @ (ell / 3000.0) ** 2, 0.0)
    got = post.like.model(spectra, {"calibration": 1.02, "fg_tt_amp": 7.0})
    assert np.allclose(got, 1.02 ** 2 * (base + 7.0 * f), rtol=1e-13, atol=0)
