"""Extended cosmologies in the CAMB backend: each extension as an optional input, checked by known physics.

References (cited from memory; the effects are common knowledge of the trade):
* massive neutrinos suppress σ₈ at fixed ω_c, ω_b and θ_* (free streaming; Lesgourgues & Pastor 2006,
  Phys. Rep. 429, 307);
* more relativistic species at fixed θ_* and z_eq damp the high-ℓ tail relative to the first peak
  (Hou, Keisler, Knox, Millea & Reichardt 2013, PRD 87, 083008);
* the primordial B-mode power is linear in the tensor-to-scalar ratio r (e.g. Kamionkowski & Kovetz 2016,
  ARA&A 54, 227), so at ℓ ≈ 80 the tensor BB of two values of r is in the ratio of the r.
"""
from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest

from infer.theory import make_theory

pytestmark = pytest.mark.camb

FID = {"omega_b": 0.0224, "omega_c": 0.120, "theta_star_100": 1.0411, "ln_As_1e10": math.log(21.0),
       "n_s": 0.965, "tau": 0.054}
EXTENSIONS = [{"sum_mnu_eV": 0.3}, {"n_eff": 3.5}, {"y_he": 0.26}, {"w0": -0.9, "wa": -0.3},
              {"omega_k": -0.02}, {"r": 0.1}, {"a_lens": 1.2}, {"n_run": -0.01}]


@pytest.fixture(scope="module")
def camb_fast():
    return make_theory({"code": "camb", "accuracy": "fast"}, 2000)


@pytest.mark.parametrize("extra", EXTENSIONS, ids=lambda e: ",".join(e))
def test_theta_star_sampling_works_with_every_extension(camb_fast, extra):
    base = camb_fast.compute(FID)
    s = camb_fast.compute({**FID, **extra})
    assert s.derived["theta_star_100"] == pytest.approx(FID["theta_star_100"], rel=5e-5)
    assert np.all(s.dl["TT"][2:] > 0) and not np.allclose(s.dl["TT"][30:], base.dl["TT"][30:], rtol=1e-4)


def test_sigma8_falls_as_neutrino_mass_grows(camb_fast):
    s8 = [camb_fast.compute({**FID, "sum_mnu_eV": m}).derived["sigma_8"] for m in (0.06, 0.3, 0.6)]
    assert s8[0] > s8[1] > s8[2]
    # the rough rule Δσ₈/σ₈ ≈ −(a few) × f_ν (Lesgourgues & Pastor 2006): f_ν = ω_ν/ω_m ≈ 0.0054 at 0.3 eV
    assert 0.02 < 1 - s8[1] / s8[0] < 0.15


def test_damping_tail_drops_as_n_eff_rises_at_fixed_theta_and_z_eq(camb_fast):
    def tail_over_peak(n_eff):
        scale = (1 + 0.2271 * n_eff) / (1 + 0.2271 * 3.044)        # ω_m ∝ 1 + 0.2271 N_eff keeps z_eq
        omega_c = (FID["omega_b"] + FID["omega_c"]) * scale - FID["omega_b"]
        tt = camb_fast.compute({**FID, "omega_c": omega_c, "n_eff": n_eff}).dl["TT"]
        return tt[1800:2001].mean() / tt[150:300].max()
    assert tail_over_peak(3.8) < tail_over_peak(3.044) * 0.97


def test_tensor_bb_is_linear_in_r(camb_fast):
    bb = {r: camb_fast.compute({**FID, "r": r}).dl["BB"][75:86].mean() for r in (0.0, 0.05, 0.1)}
    tensor = {r: bb[r] - bb[0.0] for r in (0.05, 0.1)}
    assert tensor[0.05] > 0
    assert tensor[0.1] / tensor[0.05] == pytest.approx(2.0, rel=0.02)


def test_degenerate_masses_differ_from_one_massive_state():
    one = make_theory({"code": "camb", "accuracy": "fast"}, 1000).compute({**FID, "sum_mnu_eV": 0.3})
    three = make_theory({"code": "camb", "accuracy": "fast", "neutrino_masses": "degenerate"}, 1000).compute(
        {**FID, "sum_mnu_eV": 0.3})
    assert three.derived["omega_nu"] == pytest.approx(one.derived["omega_nu"], rel=1e-3)
    assert three.derived["sigma_8"] != pytest.approx(one.derived["sigma_8"], rel=1e-4)


def test_curvature_beyond_the_handled_range_costs_one_point(camb_fast):
    from infer.theory import TheoryError
    with pytest.raises(TheoryError) as err:
        camb_fast.compute({**FID, "omega_k": -0.5})
    assert err.value.reason == "outside-code-range"


def test_an_extension_the_code_does_not_read_is_one_line(tmp_path):
    from tests.conftest import make_quick_dataset, quick_config_text
    data = make_quick_dataset(tmp_path / "d.h5")
    run = tmp_path / "run.toml"
    run.write_text(quick_config_text(data, tmp_path / "c.h5") + "\n[parameters.w0]\nvalue = -0.9\n")
    res = subprocess.run([sys.executable, "-m", "infer", "check", str(run)], capture_output=True, text=True)
    assert res.returncode == 2 and res.stderr.count("\n") == 1
    assert "[parameters.w0] is not read by theory code 'templates'" in res.stderr
