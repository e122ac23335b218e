"""Thermodynamic conversion and the thermal SZ spectrum (infer.model.sed) against outside references.

References: Planck's law and its derivative built here directly from CODATA constants (scipy.constants);
the closed form (eˣ − 1)²/(x² eˣ) of the thermodynamic-to-Rayleigh–Jeans ratio (common practice);
the tSZ null at x ≈ 3.83, ν ≈ 217 GHz for T₀ = 2.7255 K (common knowledge of the trade; Sunyaev &
Zel'dovich 1972); T₀ from Fixsen 2009, ApJ 707, 916.
"""
from __future__ import annotations

import numpy as np
import pytest
from scipy import constants as sc
from scipy import optimize

from infer.errors import UserError
from infer.model import sed

NU = np.array([30.0, 90.0, 150.0, 220.0, 353.0, 545.0])


def blackbody_codata(nu_ghz, t):
    nu = nu_ghz * 1e9
    return 2 * sc.h * nu**3 / sc.c**2 / (np.exp(sc.h * nu / (sc.k * t)) - 1)


def test_dbdt_equals_a_numerical_derivative_of_the_blackbody_law():
    h = 1e-4
    numeric = (blackbody_codata(NU, 2.7255 + h) - blackbody_codata(NU, 2.7255 - h)) / (2 * h)
    np.testing.assert_allclose(sed.dbdt(NU), numeric, rtol=1e-7)
    np.testing.assert_allclose(sed.blackbody(NU, 2.7255), blackbody_codata(NU, 2.7255), rtol=1e-12)


def test_thermodynamic_over_rayleigh_jeans_closed_form():
    x = sc.h * NU * 1e9 / (sc.k * 2.7255)
    closed = (np.exp(x) - 1) ** 2 / (x**2 * np.exp(x))
    np.testing.assert_allclose(sed.thermo_over_rj(NU), closed, rtol=1e-12)
    # the same ratio from the derivative: dB/dT over the Rayleigh–Jeans 2kν²/c²
    rj = 2 * sc.k * (NU * 1e9) ** 2 / sc.c**2
    np.testing.assert_allclose(rj / sed.dbdt(NU), closed, rtol=1e-10)


def test_tsz_null_near_217_ghz():
    nu0 = optimize.brentq(sed.tsz_f, 150.0, 300.0)
    x0 = sc.h * nu0 * 1e9 / (sc.k * sed.T_CMB)
    assert x0 == pytest.approx(3.83, abs=0.005)
    assert nu0 == pytest.approx(217.0, abs=1.0)
    assert sed.tsz_f(150.0) < 0 < sed.tsz_f(353.0)
    assert sed.tsz_f(1.0) == pytest.approx(-2.0, abs=1e-3)     # Rayleigh–Jeans limit f → −2


def test_narrow_bandpass_equals_the_band_centre():
    nu = np.linspace(149.999, 150.001, 5)
    w = np.ones_like(nu)
    assert sed.tsz_thermo(150.0, (nu, w)) == pytest.approx(sed.tsz_thermo(150.0), rel=1e-8)
    dust = lambda n: sed.mbb(n, 1.5, 19.6)          # noqa: E731
    assert sed.to_thermo(dust, 150.0, (nu, w)) == pytest.approx(sed.to_thermo(dust, 150.0), rel=1e-8)


def test_wide_bandpass_averages_in_intensity():
    nu = np.linspace(130.0, 170.0, 401)
    w = np.ones_like(nu)
    expect = np.trapezoid(sed.tsz_f(nu) * sed.dbdt(nu), nu) / np.trapezoid(sed.dbdt(nu), nu)
    assert sed.tsz_thermo(150.0, (nu, w)) == pytest.approx(expect, rel=1e-12)
    assert sed.tsz_thermo(150.0, (nu, w)) != pytest.approx(sed.tsz_thermo(150.0), rel=1e-4)


@pytest.mark.parametrize("nu, w, needle", [
    ([100.0, 90.0], [1.0, 1.0], "increasing"),
    ([90.0, 100.0], [0.0, 0.0], "does not integrate"),
    ([90.0, 100.0], [1.0, -2.0], "≥ 0"),
    ([90.0, np.inf], [1.0, 1.0], "non-finite"),
])
def test_a_bandpass_that_does_not_integrate_is_one_line(nu, w, needle):
    with pytest.raises(UserError) as err:
        sed.check_bandpass(nu, w, "bp.txt")
    assert needle in str(err.value) and str(err.value).startswith("bp.txt")
