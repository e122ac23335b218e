"""The accuracy-preset check (infer.model.accuracy): Δχ² between the run's preset and a reference preset.

References: the Δχ² is checked against its definition, χ²_run(θ) − χ²_ref(θ) from two independently built
`Posterior` objects, and the χ² itself against scipy.stats.multivariate_normal.logpdf of the band powers
(χ² = −2 ln N(d | m, C) − ln det(2πC), the Gaussian likelihood: common practice). The Sobol points are
checked against scipy.stats.qmc.Sobol itself.
"""
from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pytest

from infer import config
from infer.errors import UserError
from infer.model import accuracy

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "kestrel_demo.toml"


def small_camb_config(tmp_path, accuracy_preset="fast", ell_max=400) -> Path:
    """The demo's run file on the Kestrel band powers cut to 30 ≤ ℓ ≤ ell_max (a cheaper CAMB call)."""
    text = DEMO.read_text()
    text = text.replace('file = "data/kestrel_bandpowers.h5"',
                        f'file = "{ROOT / "configs" / "data" / "kestrel_bandpowers.h5"}"')
    text = text.replace("ell_max = 1500", f"ell_max = {ell_max}")
    text = text.replace('accuracy = "standard"', f'accuracy = "{accuracy_preset}"')
    text = text.replace('"../chains/kestrel-demo.h5"', f'"{tmp_path / "c.h5"}"')
    text = text.replace('"../chains/kestrel-demo"', f'"{tmp_path / "s"}"')
    path = tmp_path / "small.toml"
    path.write_text(text)
    return path


# -- no Boltzmann call -------------------------------------------------------------------------------------
def test_points_are_the_guess_then_scrambled_sobol_points_in_the_ball(tmp_path):
    from scipy.stats import qmc
    cfg = config.load(small_camb_config(tmp_path))
    x = accuracy.check_points(cfg, 5, seed=3)
    guess = np.array([p.guess for p in cfg.sampled])
    spread = np.array([p.spread for p in cfg.sampled])
    assert np.array_equal(x[0], guess)
    lo, hi = guess - accuracy.BALL_SPREADS * spread, guess + accuracy.BALL_SPREADS * spread
    # reference: scipy's own scrambled Sobol sequence, same seed, scaled to the same box
    want = qmc.scale(qmc.Sobol(d=guess.size, scramble=True, seed=3).random_base2(2), lo, hi)
    np.testing.assert_allclose(x[1:], want, rtol=0, atol=0)
    assert np.array_equal(accuracy.check_points(cfg, 5, seed=3), x)          # reproducible


def test_prior_region_uses_uniform_ranges_and_central_two_sigma_of_normal_priors(tmp_path):
    cfg = config.load(small_camb_config(tmp_path))
    lo, hi = accuracy.box(cfg, "prior")
    names = [p.name for p in cfg.sampled]
    i, j = names.index("omega_c"), names.index("calibration")
    assert (lo[i], hi[i]) == (0.001, 0.99)
    assert (lo[j], hi[j]) == pytest.approx((1.0 - 2 * 0.0025, 1.0 + 2 * 0.0025))


def _result(delta, threshold=accuracy.DELTA_CHI2_GOOD):
    n = len(delta)
    ref = np.full(n, 100.0)
    return accuracy.PresetCheck("camb", "fast", "high", ("a",), np.zeros((n, 1)), ref + np.asarray(delta), ref,
                                [None] * n, {"TT": 1e-3}, {"TT": (30, 400)}, 1.0, 2.0, threshold, "ball", 10)


def test_verdict_flips_where_the_largest_shift_crosses_the_threshold():
    assert _result([0.05, -0.09]).verdict == "good enough"
    assert _result([0.05, -0.11]).verdict == "not good enough"
    assert _result([0.05, -0.09], threshold=0.08).verdict == "not good enough"
    nan = _result([math.nan])
    nan.reasons = ["theta-out-of-range"]
    assert nan.verdict == "undetermined"
    assert any("not computed (theta-out-of-range)" in line for line in nan.lines())


def test_shift_estimate_is_the_exact_peak_shift_of_a_gaussian_with_a_linear_delta_chi2():
    # χ²_ref = t² (Gaussian, peak at the guess t = 0), χ²_run = t² + g t: the run's peak sits at t = −g/2
    # (closed form), i.e. shifted by g/2 σ; points at t = 2 and t = −3.
    g = 0.08
    t = np.array([0.0, 2.0, -3.0])
    ref = t**2 + 170.0
    check = accuracy.PresetCheck("camb", "fast", "high", ("a",), t[:, None], ref + g * t, ref, [None] * 3,
                                 {"TT": 1e-3}, {"TT": (30, 400)}, 1.0, 2.0)
    np.testing.assert_allclose(check.shift_estimates, [g / 2, g / 2], rtol=1e-12)
    # the strict verdict fails (|Δχ²| = 3 g = 0.24 at t = −3, far out) although the shift is 0.04 σ: conservative
    assert check.verdict == "not good enough"


def _no_boltzmann(monkeypatch):
    from infer.theory import camb as camb_backend

    def refuse(*args, **kwargs):
        raise AssertionError("a Boltzmann backend was built")
    monkeypatch.setattr(camb_backend.CambTheory, "__init__", refuse)


def test_unknown_reference_preset_is_one_line_before_any_boltzmann_call(tmp_path, monkeypatch):
    cfg = config.load(small_camb_config(tmp_path))
    _no_boltzmann(monkeypatch)
    with pytest.raises(UserError) as err:
        accuracy.preset_check(cfg, reference="ultra")
    msg = str(err.value)
    assert "\n" not in msg and "'ultra'" in msg and "fast, standard, high" in msg and str(cfg.path) in msg
    for bad in ({"points": 0}, {"points": 2.5}, {"points": True}, {"region": "sky"}, {"threshold": -1.0}):
        with pytest.raises(UserError):
            accuracy.preset_check(cfg, **bad)


def test_cli_check_refuses_an_unknown_reference_in_one_line_before_any_theory(tmp_path, monkeypatch, capsys):
    from infer.cli import main
    path = small_camb_config(tmp_path)
    _no_boltzmann(monkeypatch)
    assert main(["check", str(path), "--presets", "--preset-reference", "ultra"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "'ultra'" in err and "Traceback" not in err


def test_reference_equal_to_the_run_preset_computes_nothing(tmp_path, monkeypatch):
    cfg = config.load(small_camb_config(tmp_path, "high"))
    _no_boltzmann(monkeypatch)
    result = accuracy.preset_check(cfg, reference="high")
    assert result.same and result.verdict == "same preset"
    assert "already the reference" in result.lines()[0]


def test_a_model_without_presets_is_refused(write_config):
    path, _ = write_config()
    with pytest.raises(UserError, match="no accuracy presets"):
        accuracy.preset_check(config.load(path))


def test_class_presets_are_read_from_its_backend():
    assert accuracy.presets_of("class") == ("fast", "standard", "high")
    assert accuracy.presets_of("camb") == ("fast", "standard", "high")


# -- CAMB ------------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def camb_check(tmp_path_factory):
    path = small_camb_config(tmp_path_factory.mktemp("acc"), "fast")
    cfg = config.load(path)
    return cfg, accuracy.preset_check(cfg, points=2, reference="standard", seed=5)


@pytest.mark.camb
@pytest.mark.slow
def test_delta_chi2_equals_two_posteriors_and_the_gaussian_likelihood(camb_check):
    from scipy import stats
    from infer.model.posterior import Posterior
    cfg, result = camb_check
    assert result.reasons == [None, None] and result.x.shape == (2, len(cfg.sampled))
    run = Posterior(cfg)
    ref = Posterior(dataclasses.replace(cfg, theory={**cfg.theory, "accuracy": "standard"}))
    assert ref.theory.describe()["accuracy"] == "standard" and run.theory.describe()["accuracy"] == "fast"
    direct = np.array([run(x)[1][-1] - ref(x)[1][-1] for x in result.x])       # definition: χ² blob fields
    # Two CAMB instances agree to ~1e-9 in χ² (measured: 4e-10), not bit for bit; 1e-6 is 1e-5 of the threshold.
    np.testing.assert_allclose(result.delta_chi2, direct, rtol=0, atol=1e-6)
    assert np.all(np.abs(direct) > 1e-4)                # the presets do differ (linear vs non-linear lensing)
    # χ² of the reference preset at the guess against scipy.stats (Gaussian likelihood, common practice)
    d, cov = np.asarray(ref.data.value), np.asarray(ref.data.covariance)
    m = ref.model_bands(result.x[0])
    chi2 = -2 * stats.multivariate_normal.logpdf(d, mean=m, cov=cov) - np.linalg.slogdet(2 * np.pi * cov)[1]
    assert result.chi2_ref[0] == pytest.approx(chi2, rel=1e-9)
    # the lensing smoothing differs most in the peaks: a relative TT change of 1e-4 … 1e-2 (camb.py table)
    assert 1e-5 < result.max_rel_dev["TT"] < 1e-2
    assert set(result.max_rel_dev) == {"TT", "TE", "EE"}


@pytest.mark.camb
@pytest.mark.slow
def test_the_measured_verdict_flips_at_the_measured_shift(camb_check):
    _, result = camb_check
    worst = result.max_abs_delta_chi2
    assert dataclasses.replace(result, threshold=1.01 * worst).verdict == "good enough"
    assert dataclasses.replace(result, threshold=0.99 * worst).verdict == "not good enough"
    text = "\n".join(result.lines())
    assert "verdict" in text and "'fast' against 'standard'" in text
