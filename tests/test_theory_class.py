"""The CLASS backend (``code = "class"``) against CAMB, and its failure handling.

Reference: CLASS (classy on PyPI; Blas, Lesgourgues & Tram 2011, JCAP 07, 034) and CAMB (Lewis, Challinor
& Lasenby 2000, ApJ 538, 473) are independent Boltzmann codes; agreement of lensed TT and EE to 0.5 % for
30 ≤ ℓ ≤ 2000 at a ΛCDM point is the target of issue 11 (the codes' published comparisons reach
~0.1 %, from memory). The extensions are not yet cross-checked here.
"""
from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

from infer.theory import TheoryError, make_theory

pytestmark = pytest.mark.camb

FID = {"omega_b": 0.0224, "omega_c": 0.120, "H0": 67.4, "ln_As_1e10": float(np.log(21.0)), "n_s": 0.965,
       "tau": 0.054}
ELL_MAX, LO = 2000, 30


@pytest.fixture(scope="module")
def both():
    class_ = make_theory({"code": "class", "accuracy": "standard"}, ELL_MAX).compute(FID)
    camb_ = make_theory({"code": "camb", "accuracy": "standard"}, ELL_MAX).compute(FID)
    return class_, camb_


def test_lcdm_tt_ee_agree_with_camb(both):
    a, b = both
    for kind in ("TT", "EE"):
        rel = np.abs(a.dl[kind][LO:] / b.dl[kind][LO:] - 1)
        assert rel.max() < 5e-3, (kind, rel.max())
    te = np.abs(a.dl["TE"][LO:] - b.dl["TE"][LO:]).max() / np.abs(b.dl["TE"][LO:]).max()
    assert te < 5e-3


def test_derived_quantities_agree_with_camb(both):
    a, b = both
    # CLASS's "100*theta_star" is not CAMB's θ_* (measured 0.29 % apart; see infer/theory/classy.py)
    assert a.derived["sigma_8"] == pytest.approx(b.derived["sigma_8"], rel=5e-3)
    assert a.derived["Omega_m"] == pytest.approx(b.derived["Omega_m"], rel=2e-3)
    assert a.derived["age_Gyr"] == pytest.approx(b.derived["age_Gyr"], rel=2e-3)


def test_a_class_failure_costs_one_point():
    theory = make_theory({"code": "class", "accuracy": "fast"}, 500)
    with pytest.raises(TheoryError) as err:
        theory.compute(dict(FID, omega_c=5.0, H0=30.0))       # Ω_m > 1 in a flat model: CLASS refuses
    assert err.value.reason in ("class-error", "unphysical")
    ok = theory.compute(FID)                                   # the same instance still works
    assert ok.dl["TT"][200] > 0


def test_a_lens_is_refused_for_class_before_any_call(tmp_path):
    from tests.conftest import make_quick_dataset
    data = make_quick_dataset(tmp_path / "d.h5")
    params = "".join(f"[parameters.{k}]\nvalue = {v}\n" for k, v in FID.items() if k != "n_s")
    run = tmp_path / "run.toml"
    run.write_text(f'[dataset]\nfile = "{data}"\n[theory]\ncode = "class"\n{params}'
                   '[parameters.n_s]\nprior = { uniform = [0.9, 1.0] }\nguess = 0.965\n'
                   '[parameters.a_lens]\nvalue = 1.2\n')
    res = subprocess.run([sys.executable, "-m", "infer", "check", str(run)], capture_output=True, text=True)
    assert res.returncode == 2 and res.stderr.count("\n") == 1 and "a_lens" in res.stderr
