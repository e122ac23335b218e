"""Spectral energy distributions in CMB thermodynamic units: Planck's law, dB_ν/dT, bandpasses, tSZ.

Units and conventions (stated once, used by every foreground term):

* Intensities are specific intensities I_ν in W m⁻² Hz⁻¹ sr⁻¹ (SI; 1 Jy/sr = 1e-26 of these). Only
  ratios of SEDs enter the model, so the overall unit cancels; what matters is that every SED below is
  an *intensity* SED.
* A CMB temperature fluctuation δT gives δI_ν = (∂B_ν/∂T)|_{T₀} δT with T₀ = 2.7255 K (Fixsen 2009,
  ApJ 707, 916). With x = hν/(k T₀),  ∂B_ν/∂T = (2 k³ T₀² / h² c²) · x⁴ eˣ / (eˣ − 1)²; the factor
  turning a small intensity into thermodynamic temperature, relative to the Rayleigh–Jeans (antenna)
  temperature, is (eˣ − 1)² / (x² eˣ) (common practice). Constants from `scipy.constants` (CODATA).
* A bandpass is data: frequencies ν_i (GHz) and weights w_i, the channel's *response to a source of
  constant specific intensity* (signal ∝ ∫ w(ν) I_ν dν). The thermodynamic amplitude of a component with
  intensity SED I(ν) is then a = ∫ w I dν / ∫ w ∂B/∂T dν (trapezoid rule on the given samples). A band
  centre alone means w = δ(ν − ν_c): a = I(ν_c) / ∂B/∂T(ν_c).
* Modified blackbody (thermal dust, clustered CIB): I_ν ∝ ν^β B_ν(T_d) (common practice).
* Thermal SZ, non-relativistic: δT/T₀ = y f(x), f(x) = x coth(x/2) − 4 (Sunyaev & Zel'dovich 1972,
  Comments Astrophys. Space Phys. 4, 173), i.e. the intensity SED f(x) · ∂B/∂T; null at x ≈ 3.83 (ν ≈ 217 GHz).
"""
from __future__ import annotations

import numpy as np
from scipy import constants as sc

#: CMB monopole temperature (K), Fixsen 2009, ApJ 707, 916.
T_CMB = 2.7255
#: Physical range accepted for SED parameters (dust/CIB temperature in K, spectral indices).
TD_RANGE = (1.0, 200.0)
BETA_RANGE = (-3.0, 6.0)


def x_of(nu_ghz, t=T_CMB):
    """x = hν / (k T) for ν in GHz."""
    return sc.h * np.asarray(nu_ghz, float) * 1e9 / (sc.k * t)


def blackbody(nu_ghz, t):
    """Planck's law B_ν(T), W m⁻² Hz⁻¹ sr⁻¹."""
    nu = np.asarray(nu_ghz, float) * 1e9
    return 2.0 * sc.h * nu ** 3 / sc.c ** 2 / np.expm1(sc.h * nu / (sc.k * t))


def dbdt(nu_ghz, t=T_CMB):
    """∂B_ν/∂T at T (W m⁻² Hz⁻¹ sr⁻¹ K⁻¹), closed form."""
    x = x_of(nu_ghz, t)
    return 2.0 * sc.k ** 3 * t ** 2 / (sc.h * sc.c) ** 2 * x ** 4 * np.exp(x) / np.expm1(x) ** 2


def thermo_over_rj(nu_ghz):
    """(eˣ − 1)² / (x² eˣ): thermodynamic over Rayleigh–Jeans temperature for a small signal."""
    x = x_of(nu_ghz)
    return np.expm1(x) ** 2 / (x ** 2 * np.exp(x))


def tsz_f(nu_ghz):
    """f(x) = x coth(x/2) − 4 (non-relativistic tSZ, thermodynamic units)."""
    x = x_of(nu_ghz)
    return x / np.tanh(0.5 * x) - 4.0


def mbb(nu_ghz, beta, td):
    """Modified blackbody intensity ν^β B_ν(T_d) (arbitrary normalisation, ν in GHz)."""
    return np.asarray(nu_ghz, float) ** beta * blackbody(nu_ghz, td)


def _integrate(y, nu):
    return float(np.trapezoid(y, nu)) if hasattr(np, "trapezoid") else float(np.trapz(y, nu))


def to_thermo(intensity, nu_c, bandpass=None):
    """Thermodynamic amplitude (K per unit of ``intensity``'s normalisation) of an intensity SED
    ``intensity(nu_ghz)`` seen by a channel: band centre ``nu_c`` (GHz) or ``bandpass = (nu, w)``."""
    if bandpass is None:
        return float(intensity(np.array([nu_c]))[0] / dbdt(np.array([nu_c]))[0])
    nu, w = (np.asarray(a, float) for a in bandpass)
    return _integrate(w * intensity(nu), nu) / _integrate(w * dbdt(nu), nu)


def tsz_thermo(nu_c, bandpass=None):
    """Bandpass-integrated tSZ f in thermodynamic units (intensity SED f(x) ∂B/∂T)."""
    return to_thermo(lambda nu: tsz_f(nu) * dbdt(nu), nu_c, bandpass)


def check_bandpass(nu, w, where: str):
    """A bandpass that integrates: finite, ν > 0 increasing, w ≥ 0 with positive integral."""
    from infer.errors import UserError
    nu, w = np.asarray(nu, float), np.asarray(w, float)
    if nu.ndim != 1 or nu.shape != w.shape or len(nu) < 2:
        raise UserError(f"{where}: a bandpass needs two equal-length arrays of ≥ 2 samples")
    if not (np.all(np.isfinite(nu)) and np.all(np.isfinite(w))):
        raise UserError(f"{where}: bandpass holds non-finite values")
    if not (nu[0] > 0 and np.all(np.diff(nu) > 0)):
        raise UserError(f"{where}: bandpass frequencies must be positive and increasing")
    if np.any(w < 0) or not _integrate(w, nu) > 0:
        raise UserError(f"{where}: bandpass weights must be ≥ 0 with a positive integral (it does not integrate)")
