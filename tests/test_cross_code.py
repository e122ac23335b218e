"""CAMB and CLASS give the same χ² on the Kestrel demo data, to the bound the cross-code grid measured.

Reference: CLASS (classy on PyPI; Blas, Lesgourgues & Tram 2011, JCAP 07, 034), an independent Boltzmann code.
At each point CAMB (``standard``, the demo's preset) computes the spectra from θ_* and CLASS (``standard``:
the same HMcode-2020 non-linear lensing) at the H₀ CAMB solved for; Δχ² = χ²_CAMB − χ²_CLASS on the demo
data set as the demo cuts it (configs/kestrel_demo.toml). The points are the first of the scrambled-Sobol
grid of benchmarks/bench_cross_code.py (ΛCDM, and the w₀–w_a box); the bound is justified there and in
the module constant below.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from infer import config
from infer.model.likelihood import BandPowerLikelihood
from infer.model.posterior import load_data
from infer.theory import make_theory

pytestmark = [pytest.mark.camb, pytest.mark.slow]

DEMO = Path(__file__).resolve().parents[1] / "configs" / "kestrel_demo.toml"
#: |Δχ²| bound, from the grid of benchmarks/bench_cross_code.py (benchmarks/bench_cross_code.out.txt: 20 ΛCDM
#: points and 6 per extension in a ±2σ box): |Δχ²| ≤ 5.9 over ΛCDM and ≤ 3.4 over w₀–w_a; ≤ 4.1 over all 26
#: points near the fit (χ² < 300; the fiducial has 178); 12.0 at most anywhere (Ω_k, at a point with χ² = 696).
#: Measured at the three points below: −3.41, −0.05, −3.37. The bound 10 sits above every ΛCDM and w₀–w_a grid
#: value, so it flags a regression (a broken input mapping, a changed preset), not the codes' known 0.1–0.3 %
#: disagreement. (Near the fit Δχ² ≈ −2 is mostly the cross term 2rᵀC⁻¹δ with this one noise realisation r;
#: the codes' own separation δᵀC⁻¹δ is 0.19 at the fiducial: benchmarks/bench_cross_code.py --fiducial.)
DCHI2_MAX = 10.0
TAU = 0.055
POINTS = [  # the grid's first ΛCDM point and its first w₀–w_a point (6 significant digits)
    ("lcdm-0", {"omega_b": 0.0223062, "omega_c": 0.119949, "theta_star_100": 1.04162, "ln_As_1e10": 3.03516,
                "n_s": 0.957354, "tau": TAU}),
    ("w0wa-0", {"omega_b": 0.0223062, "omega_c": 0.119949, "theta_star_100": 1.04162, "ln_As_1e10": 3.03516,
                "n_s": 0.957354, "w0": -1.1328, "wa": 0.0681393, "tau": TAU}),
]


@pytest.fixture(scope="module")
def setup():
    cfg = config.load(DEMO)
    data = load_data(cfg)
    like = BandPowerLikelihood(data, cfg.sections.get("likelihood"))
    camb = make_theory({"code": "camb", "accuracy": "standard"}, data.ell_max_needed)
    klass = make_theory({"code": "class", "accuracy": "standard"}, data.ell_max_needed)
    return like, camb, klass


@pytest.mark.parametrize("point", POINTS, ids=[p[0] for p in POINTS])
def test_camb_and_class_agree_in_chi2(setup, point):
    like, camb, klass = setup
    _, params = point
    a = camb.compute(params)
    b = klass.compute({k: v for k, v in params.items() if k != "theta_star_100"} | {"H0": a.derived["H0"]})
    dchi2 = like.chi2(like.model(a)) - like.chi2(like.model(b))
    assert np.isfinite(dchi2) and abs(dchi2) < DCHI2_MAX, dchi2
