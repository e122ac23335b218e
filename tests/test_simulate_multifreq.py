"""Multi-frequency mocks (`infer simulate` with [channels]) and their recovery by the surrogate engine.

References beside each check: the mock's mean is the run-time model at the truths (so a noise-free mock
is fitted exactly: the definition); the recovery of the truths within the posterior's errors is the
calibration property of Bayesian inference on data drawn from the model (Talts et al. 2018,
arXiv:1804.06788, for the general statement; here one mock, so a loose 3.5 σ bound per parameter);
the covariance's single-channel limit is checked in tests/test_mock_multifreq.py (Knox 1995).
"""
from __future__ import annotations

import shutil
import textwrap
from pathlib import Path

import numpy as np
import pytest

from infer import config, data
from infer.cli import main
from infer.errors import UserError
from infer.forecast import multifreq

SPEC = Path(__file__).parent / "data" / "merlin_mini.toml"
TSZ = Path(__file__).resolve().parents[1] / "configs" / "data" / "merlin_tsz_shape.txt"
TRUTH = {"a_1": 1.0, "a_2": 1.0, "a_3": 1.0, "a_4": 1.0, "cal_90": 1.01, "cal_220": 0.99, "poleff_220": 0.98,
         "cib_amp": 30.0}
ANALYTIC = {"ps_90x90": 25.0, "ps_90x150": 9.0, "ps_90x220": 6.0, "ps_150x150": 8.0, "ps_150x220": 18.0,
            "ps_220x220": 70.0, "tsz_amp": 20.0, "dust_tt_amp": 40.0, "dust_te_amp": 1.0, "dust_ee_amp": 2.0}


def spec_copy(tmp_path, edit=None) -> Path:
    text = SPEC.read_text().replace("../../configs/data/merlin_tsz_shape.txt", str(TSZ))
    if edit:
        text = edit(text)
    path = tmp_path / "spec.toml"
    path.write_text(text)
    return path


def run_text(dataset, chain, engine="surrogate", ess=300) -> str:
    sampled = "".join(f"[parameters.{k}]\nprior = {{ uniform = [{lo}, {hi}] }}\n" for k, (lo, hi) in
                      {"a_1": (0, 3), "a_2": (0, 3), "a_3": (0, 3), "a_4": (0, 3), "cal_90": (0.9, 1.1),
                       "cal_220": (0.9, 1.1), "poleff_220": (0.9, 1.1), "cib_amp": (0, 200)}.items())
    analytic = "".join(f"[parameters.{k}]\nprior = {{ normal = [{v}, {max(10.0, v)}] }}\nanalytic = true\n"
                       for k, v in ANALYTIC.items())
    return textwrap.dedent(f"""\
        [run]
        name = "mini"
        seed = 3
        [dataset]
        file = "{dataset}"
        [theory]
        code = "templates"
        [nuisance]
        terms = ["poisson", "cib", "tsz", "dust"]
        tsz_shape = "{TSZ}"
        dust_reference_ghz = 150.0
        [sampling]
        engine = "{engine}"
        workers = 0
        [stopping]
        ess_above = {ess}
        [output]
        chain = "{chain}"
        """) + sampled + analytic


def test_noise_free_mock_is_the_model_at_the_truths(tmp_path):
    # Reference: the definition of the mock's mean (module docstring of infer.forecast.multifreq).
    out = tmp_path / "mini.h5"
    assert main(["--quiet", "simulate", str(spec_copy(tmp_path)), str(out), "--no-noise"]) == 0
    ds = data.load(out)
    assert ds.pairs[:6] == ("90x90", "90x150", "90x220", "150x150", "150x220", "220x220")
    assert ds.beam_modes.shape == (3, len(ds.kind))
    assert np.all(ds.noise[ds.channel_1 != ds.channel_2] == 0) and np.all(ds.noise[ds.kind == "TT"] >= 0)
    cfg_path = tmp_path / "run.toml"
    cfg_path.write_text(run_text(out, tmp_path / "c.h5"))
    from infer.model.posterior import Posterior
    post = Posterior(config.load(str(cfg_path)))
    x = np.array([TRUTH[n] for n in post.names])
    spectra = post.theory.compute(post.theory_inputs(x))
    values = dict(post.nuisance_values(x), **ANALYTIC)
    model = post.like.nuisance.apply(post.like.binned(spectra), values)
    np.testing.assert_allclose(model, ds.value, rtol=1e-12)
    np.testing.assert_allclose(ds.fiducial, ds.value, rtol=1e-12)


@pytest.mark.parametrize("edit, needle", [
    (lambda t: t.replace("cib_amp = 30.0", "cib_amp = 30.0\ncmb_amp = 1.0"), "sky.cmb_amp"),
    (lambda t: t.replace("[sky]", "[sky]\ncal_90 = 1.0"), "instrument truths"),
    (lambda t: t.replace('terms = ["poisson", "cib", "tsz", "dust"]', 'terms = ["poisson", "radio"]'),
     "unknown term"),
    (lambda t: t.replace("[channels.150]", "[channels.150]\nbandpass = \"nowhere.txt\""), "does not exist"),
    (lambda t: t.replace("bin_width = 100", "bin_width = 100\nshape = 2"), "unknown key"),
])
def test_bad_multifrequency_spec_is_one_line_before_any_theory_call(tmp_path, edit, needle, capsys):
    code = main(["simulate", str(spec_copy(tmp_path, edit)), str(tmp_path / "x.h5")])
    err = capsys.readouterr().err.strip()
    assert code == 2 and needle in err and len(err.splitlines()) == 1, err
    assert not (tmp_path / "x.h5").exists()


def test_a_template_that_does_not_cover_the_windows_is_one_line(tmp_path):
    short = tmp_path / "short.txt"
    np.savetxt(short, np.c_[np.arange(100, 600), np.ones(500)])
    with pytest.raises(UserError, match="must cover") as err:
        multifreq.simulate(multifreq.read_spec(spec_copy(tmp_path, lambda t: t.replace(str(TSZ), str(short)))),
                           None)
    assert "\n" not in str(err.value)


@pytest.mark.slow
def test_surrogate_engine_recovers_cosmology_and_foregrounds(tmp_path):
    # Reference: calibration of the posterior on data drawn from the model (module docstring): each truth
    # lies within 3.5 posterior sd (sampled) or 3.5 conditional sd (analytic) of the estimate.
    from infer.store.enginefile import EngineFile
    from infer.model.posterior import Posterior
    out = tmp_path / "mini.h5"
    assert main(["--quiet", "simulate", str(spec_copy(tmp_path)), str(out)]) == 0
    cfg_path = tmp_path / "run.toml"
    chain = tmp_path / "chains" / "mini.h5"
    cfg_path.write_text(run_text(out, chain, ess=250))
    assert main(["--quiet", "run", str(cfg_path)]) == 0
    state = EngineFile(str(chain)).read()
    s = state.sample
    w = np.exp(s["log_weight"] - s["log_weight"].max())
    w /= w.sum()
    mean = w @ s["position"]
    sd = np.sqrt(w @ (s["position"] - mean) ** 2)
    pulls = {n: (mean[i] - TRUTH[n]) / sd[i] for i, n in enumerate(state.names)}
    assert all(abs(p) < 3.5 for p in pulls.values()), pulls
    post = Posterior(config.load(str(cfg_path)))
    cond = post.analytic_fit(mean)
    pulls = {n: (a - ANALYTIC[n]) / e for n, (a, e) in cond.items()}
    assert all(abs(p) < 3.5 for p in pulls.values()), pulls
