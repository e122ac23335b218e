"""Lensed CMB spectra and derived parameters from CLASS, the second Boltzmann backend (``code = "class"``).

Method: the Boltzmann code CLASS (Lesgourgues 2011, arXiv:1104.2932; Blas, Lesgourgues & Tram 2011, JCAP 07,
034) through its Python wrapper ``classy`` (v3.4); lensed spectra by CLASS's curved-sky correlation-function
method. This module maps our parameter names (the CAMB backend's) onto CLASS so that both codes compute the
*same model*, and turns every CLASS failure into a countable `TheoryError`; the physics is CLASS's.

The model, input by input (the CAMB backend's conventions, measured on CAMB 2.0 and restated here):

* Flat ΛCDM by default; T₀ = 2.7255 K (Fixsen 2009, ApJ 707, 916); adiabatic scalar spectrum with pivot
  0.05 Mpc⁻¹ and running ``n_run`` (CLASS ``alpha_s``, CAMB ``nrun``: the same ½ n_run ln²(k/k_*) term).
* Neutrinos (``sum_mnu_eV``, ``n_eff``; defaults the settings of the same names): as CAMB does it, n massive
  eigenstates of Σm_ν/n each (``neutrino_masses = "one-massive"``: n = 1; ``"degenerate"``: n = 3) carry
  g = min(N_eff, n · 3.044/3) of the relativistic degrees of freedom — CLASS ``deg_ncdm = n`` with
  T_ncdm = (4/11)^{1/3} (g/n)^{1/4} — and the rest, N_eff − g, is massless (``N_ur``). (Measured in CAMB
  2.0: the massive state keeps 3.044/3 when N_eff changes; extra N_eff is massless.) Then
  ω_ν = Σm_ν/94.07 eV · (g/n)^{3/4} in both codes (agreement 1e-4, tests).
* Y_He (``y_he``; absent: BBN): CLASS's PRIMAT table ``sBBN_2025_primat.dat`` (Pitrou et al. 2018, Phys.
  Rep. 754, 1), the table family CAMB's BBN predictor uses: at ω_b = 0.0224, ΔN_eff = 0 the two give
  Y_He = 0.24565 and 0.24567 (CLASS's default PArthENoPE table: 0.24529). Points outside the table are
  ``bbn-out-of-range``, as in the CAMB backend.
* Dark energy (``w0``, ``wa``; either given): ``Omega_Lambda = 0`` and a fluid with ``w0_fld``/``wa_fld``
  and ``use_ppf = yes``, the parametrised post-Friedmann treatment of Fang, Hu & Lewis 2008 (PRD 78,
  087303) that CAMB's ``ppf`` also implements, so w may cross −1. Derived ``Omega_Lambda`` is the dark-energy
  density today (Ω_Λ + Ω_fld), as CAMB's.
* ``omega_k`` → ``Omega_k`` (|Ω_k| ≤ 0.3, else ``outside-code-range``: the CAMB backend's bound).
* ``r`` (given and > 0): tensors (``modes = s,t``), pivot 0.05 Mpc⁻¹, n_t and its running from CLASS's
  second-order slow-roll consistency (``n_t = scc``: n_t = −r/8 (2 − r/8 − n_s)), which is what CAMB's
  ``nt = None`` sets too; tensor spectra to ℓ = min(ℓ_max, 1500) as CAMB's. r = 0 computes no tensors.
* ``a_lens``: CLASS's ``A_L`` (input.c: the lensing-potential source is scaled by √A_L, so C_ℓ^φφ by A_L),
  the same non-physical lensing amplitude as CAMB's ``Alens``.
* Reionization: CLASS's ``reio_camb`` tanh model (Δz = 0.5, helium at z = 3.5, width 0.4), as CAMB's.
  τ < 0.01 is refused (``tau-out-of-range``), as in the CAMB backend. Recombination: CLASS's default HyRec
  (Lee & Ali-Haïmoud 2020, PRD 102, 083517); CAMB runs RECFAST with its calibrated corrections. CLASS's own
  ``recombination = recfast`` agrees with CAMB *less* well (largest TT/EE deviation at ℓ ≤ 2000: 0.21 %/0.26 %
  against 0.16 %/0.23 % with HyRec), so HyRec is kept. The oscillating 0.1–0.25 % TT/EE residual between the codes
  is the same at ΛCDM and at every extension point tested (TT 0.14–0.16 %), so it is not a mapping error.
* θ_*, z_*, r_*: reported with CAMB's definition — z_* where the optical depth *excluding reionization*
  reaches one (CLASS's κ(z) = 1 + τ_reio), θ_* = r_s(z_*)/D_M(z_*) — computed from CLASS's thermodynamics
  and background tables (`_last_scattering`). CLASS's own ``z_star``/``100*theta_star`` count the
  reionization optical depth too and land 0.29 % higher in θ_* (1.04429 against CAMB's 1.04124 at the
  fiducial ΛCDM point); ours agree with CAMB's to 1e-5 (tests). θ_* is not an input (give ``H0``).
  r_drag and z_drag are CLASS's ``rs_d`` and ``z_d``.
* Failures: any exception from CLASS → ``TheoryError("class-error", detail)`` (one point lost, never the run);
  ``struct_cleanup()`` after every point. Inputs CLASS must not see are refused first with the CAMB
  backend's reasons (``unphysical``, ``outside-code-range``, ``bbn-out-of-range``, ``tau-out-of-range``).

Accuracy presets (``accuracy``), measured against `REFERENCE` (CLASS at tightened precision: finer sampling
in k, ℓ and time, tighter tolerances, longer hierarchies, accurate lensing with Δℓ = 1000; HMcode-2020; 240 s
CPU) at the Kestrel fiducial ΛCDM point (H₀ = 67.5, τ = 0.055), ℓ_max = 2000, one thread
(``python benchmarks/bench_cross_code.py --presets``):

========== ===================================================== ======== ===================================
preset     CLASS settings                                         CPU s    max |ΔD_ℓ|/D_ℓ, 30 ≤ ℓ ≤ 1500 / 2000
========== ===================================================== ======== ===================================
fast       linear lensing potential, CLASS default precision      6.6      TT 1.0e-3 / 2.6e-3, EE 1.5e-3 / 2.1e-3
standard   HMcode-2020 non-linear lensing (Mead et al. 2021,      9.3      TT 9.4e-4 / 9.4e-4, EE 1.9e-3 / 1.9e-3
           MNRAS 502, 1401), CLASS default precision
high       ``standard`` + ``accurate_lensing``, finer ℓ, k and    24.4     TT 5.2e-4 / 5.2e-4, EE 1.2e-3 / 1.2e-3
           time sampling
========== ===================================================== ======== ===================================

(CPU times on a shared, heavily loaded machine; CAMB ``standard`` at the same ℓ_max: ≈ 2.3 s.) Most of the
CLASS–CAMB difference is CLASS's default precision: on the Kestrel demo bands (ℓ ≤ 1499) the separation
δᵀC⁻¹δ of the model band powers from CAMB ``standard`` is 0.19 for CLASS ``standard``, 0.10 for ``high`` and
0.06 for `REFERENCE`, whose spectra are within 0.08 % (TT) / 0.11 % (EE) of CAMB's
(``python benchmarks/bench_cross_code.py --fiducial``).

Threads: classy's C code runs OpenMP loops and reads ``OMP_NUM_THREADS`` when its library is loaded, so
``classy`` is imported inside `ClassTheory.__init__`. The object pickles as its settings.
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from infer.errors import UserError
from infer.theory.base import KINDS, Setting, Spectra, Theory, TheoryError
# Shared constants of the model (the CAMB module imports CAMB only when a CambTheory is built).
from infer.theory.camb import (MNU_MAX_DEGENERATE_EV, MNU_MAX_EV, OMEGA_K_MAX, OPTIONAL_DEFAULTS, STANDARD_N_EFF,
                               T_CMB_K, TAU_MIN, TENSOR_ELL_MAX)

#: CLASS's PRIMAT helium table (relative to CLASS's base path), the table family of CAMB's default predictor.
BBN_TABLE = "/external/bbn/sBBN_2025_primat.dat"
#: k_max (Mpc⁻¹) of the matter power spectrum (σ₈ and the non-linear correction).
PK_KMAX = 5.0

#: CLASS inputs behind each ``accuracy`` preset (see the table in the module docstring).
ACCURACY_PRESETS = {
    "fast": {},
    "standard": {"non_linear": "hmcode", "hmcode_version": "2020"},
    "high": {"non_linear": "hmcode", "hmcode_version": "2020", "accurate_lensing": 1, "l_logstep": 1.06,
             "l_linstep": 30, "k_max_tau0_over_l_max": 3.0, "k_step_sub": 0.03,
             "perturbations_sampling_stepsize": 0.05},
}
#: The high-precision CLASS run the presets are measured against (tightened along the lines of CLASS's own
#: ``cl_permille.pre``, from memory; sampling in k, ℓ and time, tolerances, hierarchies, approximation
#: switches); not a user preset: one call costs minutes.
REFERENCE = {
    "non_linear": "hmcode", "hmcode_version": "2020", "accurate_lensing": 1, "delta_l_max": 1000,
    "k_max_tau0_over_l_max": 3.0, "k_step_sub": 0.025, "k_step_super": 0.0005,
    "start_small_k_at_tau_c_over_tau_h": 0.0004, "start_large_k_at_tau_h_over_tau_k": 0.05,
    "tight_coupling_trigger_tau_c_over_tau_h": 0.005, "tight_coupling_trigger_tau_c_over_tau_k": 0.008,
    "start_sources_at_tau_c_over_tau_h": 0.006, "l_max_g": 30, "l_max_pol_g": 20, "l_max_ur": 30,
    "l_max_ncdm": 30, "tol_perturbations_integration": 1e-6, "perturbations_sampling_stepsize": 0.04,
    "radiation_streaming_trigger_tau_over_tau_k": 240.0, "radiation_streaming_trigger_tau_c_over_tau": 100.0,
    "ur_fluid_trigger_tau_over_tau_k": 50.0, "ncdm_fluid_trigger_tau_over_tau_k": 51.0,
    "tol_ncdm_synchronous": 1e-5, "l_logstep": 1.04, "l_linstep": 20, "q_linstep": 0.2,
    "transfer_neglect_delta_k_S_t0": 100.0, "transfer_neglect_delta_k_S_t1": 100.0,
    "transfer_neglect_delta_k_S_t2": 100.0, "transfer_neglect_delta_k_S_e": 100.0,
    "transfer_neglect_late_source": 3000.0,
}

SETTINGS = {
    "accuracy": Setting("choice", "standard", choices=tuple(ACCURACY_PRESETS),
                        help="accuracy preset (see the table above)"),
    "neutrino_masses": Setting("choice", "one-massive", choices=("one-massive", "degenerate"),
                               help="Σm_ν in one massive eigenstate, or shared by three degenerate ones"),
    "sum_mnu_eV": Setting("number", 0.06, low=0.0, high=MNU_MAX_EV, unit="eV",
                          help="total neutrino mass when it is not a parameter of the run"),
    "n_eff": Setting("number", STANDARD_N_EFF, low=0.0, low_open=True,
                     help="N_eff when it is not a parameter of the run (within the BBN table for Y_He)"),
}
DEFAULTS = {k: v.default for k, v in SETTINGS.items()}

#: CLASS's names of the derived values we read.
_DERIVED = ["age", "sigma8", "z_reio", "Omega_m", "rs_d", "z_d", "Omega_Lambda", "Omega0_fld", "h", "tau_reio"]


def _short(exc, limit=300):
    text = f"{type(exc).__name__}: {' '.join(str(exc).split())}"
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _bbn_range(path: Path) -> tuple[tuple[float, float], tuple[float, float]]:
    """(ω_b range, ΔN_eff range) of a CLASS helium table: a line of two counts, then (ω_b, ΔN, Y_He) rows."""
    rows = [line.split() for line in path.read_text().splitlines() if line.strip() and not line.startswith("#")]
    grid = np.array([[float(x) for x in r[:2]] for r in rows[1:]])
    return (float(grid[:, 0].min()), float(grid[:, 0].max())), (float(grid[:, 1].min()), float(grid[:, 1].max()))


def _last_scattering(cosmo, tau_reio: float) -> tuple[float, float, float]:
    """(z_*, r_s(z_*), θ_*) with CAMB's definition of z_*: the optical depth *excluding reionization* is one,
    i.e. CLASS's total optical depth κ(z) = 1 + τ_reio; θ_* = r_s(z_*)/D_M(z_*), D_M the transverse comoving
    distance (so also right for Ω_k ≠ 0). Linear interpolation in CLASS's thermodynamics and background
    tables (their sampling is ≲ 0.1 in z at recombination)."""
    th = cosmo.get_thermodynamics()
    z = np.asarray(th["z"], float)
    with np.errstate(divide="ignore"):
        kappa = -np.log(np.asarray(th["exp(-kappa)"], float))
    order = np.argsort(z)
    z, kappa = z[order], kappa[order]
    i = int(np.searchsorted(kappa, 1.0 + tau_reio))        # κ rises with z
    if not 0 < i < z.size:
        raise TheoryError("class-error", "optical depth never reaches one")
    z_star = float(np.interp(1.0 + tau_reio, kappa[i - 1:i + 1], z[i - 1:i + 1]))
    bg = cosmo.get_background()
    zb = np.asarray(bg["z"], float)[::-1]
    r_s = float(np.interp(z_star, zb, np.asarray(bg["comov.snd.hrz."], float)[::-1]))
    d_a = float(np.interp(z_star, zb, np.asarray(bg["ang.diam.dist."], float)[::-1]))
    return z_star, r_s, r_s / (d_a * (1.0 + z_star))


class ClassTheory(Theory):
    """Lensed TT, TE, EE, BB and derived values from CLASS, with the CAMB backend's parameter names."""

    code = "class"
    required = ("omega_b", "omega_c", "ln_As_1e10", "n_s", "tau")
    one_of = ("H0",)
    optional = ("sum_mnu_eV", "n_eff", "y_he", "w0", "wa", "omega_k", "r", "a_lens", "n_run")
    derived_names = ("H0", "Omega_m", "sigma_8", "S_8", "age_Gyr", "z_re", "theta_star_100", "r_drag",
                     "r_star", "z_star", "z_drag", "Omega_Lambda", "omega_nu")
    derived_tex = {"H0": r"H_0", "Omega_m": r"\Omega_{\rm m}", "sigma_8": r"\sigma_8", "S_8": r"S_8",
                   "age_Gyr": r"t_0\,[\mathrm{Gyr}]", "z_re": r"z_{\rm re}", "theta_star_100": r"100\,\theta_*",
                   "r_drag": r"r_{\rm drag}\,[\mathrm{Mpc}]", "r_star": r"r_*\,[\mathrm{Mpc}]", "z_star": r"z_*",
                   "z_drag": r"z_{\rm drag}", "Omega_Lambda": r"\Omega_{\rm DE}", "omega_nu": r"\omega_\nu"}
    SETTINGS = SETTINGS
    point_settings = ("sum_mnu_eV", "n_eff")

    def __init__(self, ell_max: int, settings: dict, where: str = "[theory]"):
        super().__init__(ell_max)
        if self.ell_max < 2:
            raise UserError(f"{where}: the data need ell_max = {self.ell_max}; CLASS needs at least 2")
        self.where = where
        self.settings = self.check_settings(settings, where)
        self._precision = ACCURACY_PRESETS[self.settings["accuracy"]]
        from classy import Class  # deferred (threads)
        import classy
        self._Class = Class
        self._version = str(getattr(classy, "__version__", "?"))
        self._ombh2_range, self._dn_range = _bbn_range(Path(classy.__file__).parent / BBN_TABLE.lstrip("/"))
        dn = self.settings["n_eff"] - STANDARD_N_EFF
        if not self._dn_range[0] <= dn <= self._dn_range[1]:
            lo, hi = (STANDARD_N_EFF + x for x in self._dn_range)
            raise UserError(f"{where}: n_eff = {self.settings['n_eff']} is outside the BBN table used for the "
                            f"helium fraction ({lo:.3f} … {hi:.3f})")
        self._cosmo = Class()

    @classmethod
    def reference(cls, ell_max: int, settings: dict | None = None) -> "ClassTheory":
        """A backend at the `REFERENCE` precision (for measuring the presets; minutes per call)."""
        theory = cls(ell_max, {**(settings or {}), "accuracy": "high"})
        theory._precision = REFERENCE
        return theory

    def describe(self) -> dict:
        return {"code": "class", "class_version": self._version, "ell_max": self.ell_max,
                "accuracy": self.settings["accuracy"], "precision": dict(self._precision),
                "nonlinear_lensing": "hmcode2020" if "non_linear" in self._precision else "none",
                "neutrino_masses": self.settings["neutrino_masses"], "sum_mnu_eV": self.settings["sum_mnu_eV"],
                "n_eff": self.settings["n_eff"], "T_cmb_K": T_CMB_K, "YHe": "BBN " + BBN_TABLE.rsplit("/", 1)[-1],
                "tau_min": TAU_MIN, "tensor_ell_max": TENSOR_ELL_MAX}

    def versions(self):
        return {"classy": self._version}

    def __reduce__(self):
        given = {k: self.settings[k] for k in DEFAULTS}
        return (type(self), (self.ell_max, given, self.where))

    # -- one point --------------------------------------------------------------------------------------
    def class_input(self, params: dict) -> dict:
        """Our parameters → CLASS's input dictionary; `TheoryError` for points CLASS must not see."""
        missing = [n for n in self.required if n not in params]
        given = [n for n in self.one_of if n in params]
        if missing or len(given) != 1:
            raise ValueError(f"ClassTheory.compute needs {', '.join(self.required)} and exactly one of "
                             f"{', '.join(self.one_of)}; got {', '.join(sorted(params))}")
        v = {k: float(x) for k, x in params.items() if k in self.inputs}
        bad = [n for n, x in v.items() if not math.isfinite(x)]
        if bad:
            raise TheoryError("unphysical", f"non-finite {', '.join(bad)}")
        if v["omega_b"] <= 0 or v["omega_c"] <= 0:
            raise TheoryError("unphysical", f"omega_b = {v['omega_b']}, omega_c = {v['omega_c']} must be positive")
        if v["H0"] <= 0:
            raise TheoryError("unphysical", f"H0 = {v['H0']}")
        if v["tau"] < TAU_MIN:
            reason = "unphysical" if v["tau"] <= 0 else "tau-out-of-range"
            raise TheoryError(reason, f"tau = {v['tau']} (need tau >= {TAU_MIN})")
        mnu = v.get("sum_mnu_eV", self.settings["sum_mnu_eV"])
        neff = v.get("n_eff", self.settings["n_eff"])
        degenerate = self.settings["neutrino_masses"] == "degenerate"
        if mnu < 0 or neff <= 0:
            raise TheoryError("unphysical", f"sum_mnu_eV = {mnu}, n_eff = {neff}")
        if mnu > (MNU_MAX_DEGENERATE_EV if degenerate else MNU_MAX_EV):
            raise TheoryError("outside-code-range", f"sum_mnu_eV = {mnu} (see MNU_MAX_EV)")
        if "y_he" in v:
            if not 0.01 <= v["y_he"] <= 0.5:
                raise TheoryError("unphysical", f"y_he = {v['y_he']} (need 0.01 … 0.5)")
        else:
            (lo, hi), dn = self._ombh2_range, neff - STANDARD_N_EFF
            if not lo <= v["omega_b"] <= hi:
                raise TheoryError("bbn-out-of-range", f"omega_b = {v['omega_b']} outside the BBN table [{lo}, {hi}]")
            if not self._dn_range[0] <= dn <= self._dn_range[1]:
                raise TheoryError("bbn-out-of-range", f"n_eff = {neff} outside the BBN table")
        ext = {k: v.get(k, d) for k, d in OPTIONAL_DEFAULTS.items()}
        if abs(ext["omega_k"]) > OMEGA_K_MAX:
            raise TheoryError("outside-code-range", f"omega_k = {ext['omega_k']} (|Ω_k| ≤ {OMEGA_K_MAX} handled)")
        if ext["r"] < 0 or ext["a_lens"] < 0:
            raise TheoryError("unphysical", f"r = {ext['r']}, a_lens = {ext['a_lens']} must be ≥ 0")
        try:
            A_s = math.exp(v["ln_As_1e10"]) * 1e-10
        except OverflowError:
            raise TheoryError("unphysical", f"ln_As_1e10 = {v['ln_As_1e10']}") from None

        inp = {"output": "tCl,pCl,lCl,mPk", "lensing": "yes", "l_max_scalars": self.ell_max,
               "omega_b": v["omega_b"], "omega_cdm": v["omega_c"], "H0": v["H0"], "A_s": A_s, "n_s": v["n_s"],
               "alpha_s": ext["n_run"], "tau_reio": v["tau"], "T_cmb": T_CMB_K, "Omega_k": ext["omega_k"],
               "reio_parametrization": "reio_camb", "reionization_width": 0.5, "helium_fullreio_redshift": 3.5,
               "helium_fullreio_width": 0.4, "P_k_max_1/Mpc": PK_KMAX, **self._precision}
        if "y_he" in v:
            inp["YHe"] = v["y_he"]
        else:
            inp.update({"YHe": "BBN", "sBBN file": BBN_TABLE})
        if mnu > 0:
            n = 3 if degenerate else 1
            g = min(neff, n * STANDARD_N_EFF / 3.0)       # CAMB's share of N_eff in the massive states
            inp.update(N_ncdm=1, m_ncdm=mnu / n, deg_ncdm=n, N_ur=neff - g,
                       T_ncdm=(4.0 / 11.0) ** (1.0 / 3.0) * (g / n) ** 0.25)
        else:
            inp.update(N_ur=neff, N_ncdm=0)
        if "w0" in v or "wa" in v:
            inp.update(Omega_Lambda=0.0, w0_fld=ext["w0"], wa_fld=ext["wa"], use_ppf="yes")
        if "a_lens" in v:
            inp["A_L"] = ext["a_lens"]
        if ext["r"] > 0:
            inp.update(modes="s,t", r=ext["r"], n_t="scc", alpha_t="scc",
                       l_max_tensors=min(self.ell_max, TENSOR_ELL_MAX))
        return inp

    def compute(self, params: dict) -> Spectra:
        """Lensed D_ℓ (μK², ℓ = 0 … ell_max; ℓ = 0, 1 are zero) and the derived values at one point."""
        inp = self.class_input(params)
        c = self._cosmo
        try:
            c.set(inp)
            c.compute()
            raw = c.lensed_cl(self.ell_max)
            d = c.get_current_derived_parameters(_DERIVED)
            omega_nu = float(c.Omega_nu) * float(d["h"]) ** 2
            z_star, r_star, theta = _last_scattering(c, float(d["tau_reio"]))
        except Exception as exc:  # noqa: BLE001 - CLASS must never leak an exception into the sampler
            raise TheoryError("class-error", _short(exc)) from None
        finally:
            c.struct_cleanup()
            c.empty()
        ell = np.arange(self.ell_max + 1)
        to_dl = ell * (ell + 1) / (2 * np.pi) * (T_CMB_K * 1e6) ** 2
        dl = {}
        for k in KINDS:
            col = np.asarray(raw[k.lower()][: self.ell_max + 1], float) * to_dl
            col[:2] = 0.0
            dl[k] = col
        s8, om = float(d["sigma8"]), float(d["Omega_m"])
        derived = {"H0": inp["H0"], "Omega_m": om, "sigma_8": s8, "S_8": s8 * math.sqrt(max(om, 0.0) / 0.3),
                   "age_Gyr": float(d["age"]), "z_re": float(d["z_reio"]),
                   "theta_star_100": 100.0 * theta, "r_drag": float(d["rs_d"]), "r_star": r_star,
                   "z_star": z_star, "z_drag": float(d["z_d"]),
                   "Omega_Lambda": float(d["Omega_Lambda"]) + float(d["Omega0_fld"]), "omega_nu": omega_nu}
        if not all(np.all(np.isfinite(x)) for x in dl.values()) or not all(map(math.isfinite, derived.values())):
            raise TheoryError("non-finite", "CLASS returned NaN or inf")
        if np.any(dl["TT"][2:] <= 0.0) or np.any(dl["EE"][2:] <= 0.0):
            raise TheoryError("class-error", "non-positive TT or EE power")
        return Spectra(self.ell_max, dl, derived)
