"""Lensed CMB spectra and derived parameters from CAMB, for ΛCDM and its common extensions.

Method: the line-of-sight Boltzmann code CAMB (Lewis, Challinor & Lasenby 2000, ApJ 538, 473) through its
Python API; lensed spectra by the curved-sky correlation-function method (Challinor & Lewis 2005, PRD 71,
103010). This module only maps our parameter names and settings onto CAMB and turns every failure into a
countable `TheoryError`; the physics is CAMB's.

Model and fixed assumptions (each also recorded by `CambTheory.describe`):

* By default spatially flat, a cosmological constant, an adiabatic power-law scalar spectrum
  A_s (k/0.05 Mpc⁻¹)^(n_s−1) (CAMB's default pivot) and no tensors. The extensions are optional inputs
  (`Theory.optional`), each sampled or fixed like any parameter and at its default when absent
  (`OPTIONAL_DEFAULTS`): ``sum_mnu_eV`` and ``n_eff`` (defaults: the settings of the same names),
  ``y_he`` (absent: from BBN), ``w0``/``wa`` (either given: the parametrised post-Friedmann dark energy
  of Fang, Hu & Lewis 2008, PRD 78, 087303, CAMB's ``ppf``, which may cross w = −1; set before the θ_* →
  H₀ solve), ``omega_k`` (|Ω_k| ≤ `OMEGA_K_MAX`, else ``outside-code-range``), ``r`` (given: tensors on,
  n_t = −r/8 (2 − n_s − r/8) with its running, CAMB's second-order consistency default, primordial BB to ℓ = `TENSOR_ELL_MAX`), ``a_lens`` (CAMB's
  ``Alens``, scaling the lensing potential in the lensed spectra) and ``n_run`` (dn_s/d ln k). Derived
  besides: r_drag, r_*, z_*, z_drag (CAMB's), Ω_DE (``Omega_Lambda``: the dark-energy density today)
  and ω_ν = Ω_ν h².
* T₀ = 2.7255 K (Fixsen 2009, ApJ 707, 916: 2.72548 ± 0.00057 K), passed to CAMB explicitly.
* Neutrinos: total mass ``sum_mnu_eV`` (default 0.06 eV) in one massive eigenstate (setting
  ``neutrino_masses = "one-massive"``; ``"degenerate"``: three equal masses, up to 3 eV), the rest of
  ``n_eff`` (default 3.044) massless — common practice (the minimal mass of the normal ordering; N_eff =
  3.044 from the standard-model decoupling calculations of Froustey, Pitrou & Volpe 2020, JCAP 12, 015 and
  Bennett et al. 2021, JCAP 04, 073; cited from memory). The n massive states carry min(N_eff, n·3.044/3)
  of N_eff and the rest is massless (CAMB's convention, measured on CAMB 2.0).
* Helium fraction Y_He from BBN consistency with ω_b and ΔN_eff (CAMB's default PRIMAT table, Pitrou et
  al. 2018, Phys. Rep. 754, 1). Points with ω_b outside the table are refused (``bbn-out-of-range``)
  rather than silently clamped to its edge, which is what the interpolator would do.
* Recombination: CAMB's default (RECFAST with CAMB's calibrated corrections); reionization: CAMB's tanh
  model in redshift (Lewis 2008, PRD 78, 023002) with width Δz = 0.5 and helium's second reionization at
  z = 3.5, its redshift solved from τ. τ < 0.01 is refused (``tau-out-of-range``): it means z_re ≲ 2,
  where CAMB's solve stops converging (at τ = 0.001 it silently returns an unsolved z_re), and such
  values are excluded by quasar spectra anyway.
* θ_*: ``theta_star_100`` is 100 r_s(z_*)/D_M(z_*) with z_* where the optical depth *excluding
  reionization* reaches one — CAMB's ``thetastar`` (numerical, not the fitting-formula θ_MC). H₀ is solved
  by CAMB on 10 < H₀ < 100 km/s/Mpc (bisection to a relative 5×10⁻⁵ in H₀); outside that interval the
  point is ``theta-out-of-range``.
* Failures: every CAMB exception becomes ``TheoryError("camb-error", detail)``; inputs CAMB must not
  see are refused first (reasons ``unphysical``, ``bbn-out-of-range``, ``tau-out-of-range``,
  ``theta-out-of-range``; ``non-finite`` if CAMB returns NaN). CAMB's Fortran writes a few lines to
  standard output when its reionization solve fails (τ too large for z_re ≤ 50), whatever the feedback
  level; such a point is still a counted ``camb-error``.

Accuracy presets (``accuracy``), measured against a reference run (AccuracyBoost = lAccuracyBoost = 1.5,
lens_potential_accuracy 4, margin 1000) over 30 ≤ ℓ ≤ ℓ_max at the fiducial ΛCDM point:

========== ============================================================ ======================================
preset     CAMB settings                                                 max |ΔD_ℓ|/D_ℓ, ℓ_max 1500 / 2500
========== ============================================================ ======================================
fast       lens_potential_accuracy 0 (linear lensing potential),        TT 1.0e-3 / 1.1e-2, EE 2e-3 / 4e-3,
           AccuracyBoost 1                                               BB 12 % / 22 %
standard   lens_potential_accuracy 1 (non-linear lensing, HMcode-2020:  TT 6e-4 / 1.3e-3, EE 5e-4 / 7e-4,
           Mead et al. 2021, MNRAS 502, 1401), AccuracyBoost 1           BB 2.4 % / 3.8 %
high       lens_potential_accuracy 2, AccuracyBoost 1.2, lAccuracyBoost  TT 2.5e-4 / 3.6e-4, EE 4e-4 / 5e-4,
           1.2, high-precision matter transfer for σ₈                   BB 0.9 % / 0.8 %
========== ============================================================ ======================================

``fast`` is for exploring and for band powers that stop near ℓ ≈ 1500; ``standard`` for production fits
of TT/TE/EE; ``high`` for final runs, for validating ``standard`` and for anything using BB.

``ell_margin`` (default 500) is CAMB's ``lens_output_margin``: the unlensed spectra are computed to
ℓ_max + margin so that the lensing convolution is complete at the data's ℓ_max. Measured at
lens_potential_accuracy 1, ℓ_max = 1500: the largest TT error in the top 100 multipoles is 1.05e-3 with
margin 150, 5.8e-4 with 300 and 1.8e-4 with 500 (no further gain at 800), for no measurable cost — hence
500. Values below 100 are refused.

σ₈ (linear, total matter, z = 0, R = 8 h⁻¹ Mpc) needs the matter transfer function at z = 0: we ask CAMB
for it with k_max = 2 Mpc⁻¹ and, except at ``high``, its ordinary (not high-precision) k and time
sampling. Against the high-precision transfer this moves σ₈ by 2e-4 (standard) and 6e-4 (fast)
relative — well below its ≈1 % statistical error — and CLASS agrees with our σ₈ to 5e-4 (tests).
Measured with ``python benchmarks/bench_theory.py`` (one thread): the z = 0 transfer adds ≲ 0.2 s CPU to a
2–3 s call (within the timing noise), where CAMB's high-precision transfer would add 0.7–1.8 s. S_8 = σ₈ (Ω_m/0.3)^½ (common practice); Ω_m
includes the massive neutrinos.

Threads and processes: CAMB parallelises with OpenMP and honours ``OMP_NUM_THREADS`` read when its library
is first loaded. ``camb`` is therefore imported inside `CambTheory.__init__`, never when ``infer.theory``
is imported, so a worker process can set its thread count first. One CAMB instance per process: CAMB keeps
global state and is not safe to call from several threads at once. The object pickles as its settings
(the worker rebuilds it), so it can be sent to spawned workers.
"""
from __future__ import annotations

import math

import numpy as np

from infer.errors import UserError
from infer.theory.base import KINDS, Setting, Spectra, Theory, TheoryError

#: CMB monopole temperature in K (Fixsen 2009, ApJ 707, 916).
T_CMB_K = 2.7255

#: N_eff of the standard model (common practice; see the module docstring).
STANDARD_N_EFF = 3.044

#: CAMB settings behind each ``accuracy`` preset (see the table in the module docstring).
ACCURACY_PRESETS = {
    "fast": {"lens_potential_accuracy": 0, "AccuracyBoost": 1.0, "lAccuracyBoost": 1.0,
             "transfer_high_precision": False},
    "standard": {"lens_potential_accuracy": 1, "AccuracyBoost": 1.0, "lAccuracyBoost": 1.0,
                 "transfer_high_precision": False},
    "high": {"lens_potential_accuracy": 2, "AccuracyBoost": 1.2, "lAccuracyBoost": 1.2,
             "transfer_high_precision": True},
}


#: k_max (Mpc⁻¹) of the z = 0 matter transfer function used for σ₈.
SIGMA8_KMAX = 2.0
#: Interval searched for H₀ when θ_* is given (km/s/Mpc); CAMB's default.
THETA_H0_RANGE = (10.0, 100.0)
#: Smallest τ accepted (see the module docstring).
TAU_MIN = 0.01
#: Largest Σm_ν accepted: beyond it one massive eigenstate is a poor stand-in for three near-degenerate ones
#: (with ``neutrino_masses = "degenerate"`` up to MNU_MAX_DEGENERATE_EV).
MNU_MAX_EV = 1.0
MNU_MAX_DEGENERATE_EV = 3.0
#: Curvature handled: |Ω_k| ≤ this (CAMB's closed models need care with the ℓ sampling beyond it).
OMEGA_K_MAX = 0.3
#: Defaults of the optional inputs (the extensions of flat ΛCDM); Σm_ν and N_eff default to the settings.
OPTIONAL_DEFAULTS = {"w0": -1.0, "wa": 0.0, "omega_k": 0.0, "r": 0.0, "a_lens": 1.0, "n_run": 0.0}
#: Largest ℓ of the tensor (primordial B-mode) spectrum when r is given; tensors are negligible beyond.
TENSOR_ELL_MAX = 1500
#: Non-linear model for the lensing potential at lens_potential_accuracy ≥ 1 (Mead et al. 2021).
HALOFIT_VERSION = "mead2020"

_CAMB_KINDS = {"TT": 0, "EE": 1, "BB": 2, "TE": 3}   # columns of CAMB's total-spectrum array

#: Our ``[theory]`` settings: type, range and default of each (checked when the run file is read).
SETTINGS = {
    "accuracy": Setting("choice", "standard", choices=tuple(ACCURACY_PRESETS),
                        help="accuracy preset (see the table above)"),
    "sum_mnu_eV": Setting("number", 0.06, low=0.0, high=MNU_MAX_EV, unit="eV",
                          help="total neutrino mass when it is not a parameter of the run"),
    "n_eff": Setting("number", STANDARD_N_EFF, low=0.0, low_open=True,
                     help="N_eff when it is not a parameter of the run (within the BBN table for Y_He)"),
    "neutrino_masses": Setting("choice", "one-massive", choices=("one-massive", "degenerate"),
                               help="Σm_ν in one massive eigenstate, or shared by three degenerate ones"),
    "ell_margin": Setting("integer", 500, low=100, high=5000,
                          help="multipoles beyond the data's ell_max for the lensing convolution"),
}
#: Our settings and their defaults.
DEFAULTS = {k: v.default for k, v in SETTINGS.items()}


def _short(exc: BaseException, limit: int = 300) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    text = f"{type(exc).__name__}: {text}"
    return text if len(text) <= limit else text[: limit - 1] + "…"


class CambTheory(Theory):
    """Flat ΛCDM + Σm_ν lensed TT, TE, EE, BB from CAMB.

    ``settings`` is the ``[theory]`` table without its ``code`` key: ``accuracy``, ``sum_mnu_eV``,
    ``n_eff``, ``ell_margin`` (all optional). Every problem raises `UserError` naming ``where`` and the key.
    """

    code = "camb"
    #: Always read.
    required = ("omega_b", "omega_c", "ln_As_1e10", "n_s", "tau")
    #: Exactly one of these is read (H₀ in km/s/Mpc, or 100 θ_*).
    one_of = ("H0", "theta_star_100")
    #: Extensions of flat ΛCDM, read when the run gives them (defaults: `OPTIONAL_DEFAULTS` and the settings).
    optional = ("sum_mnu_eV", "n_eff", "y_he", "w0", "wa", "omega_k", "r", "a_lens", "n_run")
    derived_names = ("H0", "Omega_m", "sigma_8", "S_8", "age_Gyr", "z_re", "theta_star_100", "r_drag", "r_star",
                     "z_star", "z_drag", "Omega_Lambda", "omega_nu")
    derived_tex = {"H0": r"H_0", "Omega_m": r"\Omega_{\rm m}", "sigma_8": r"\sigma_8", "S_8": r"S_8",
                   "age_Gyr": r"t_0\,[\mathrm{Gyr}]", "z_re": r"z_{\rm re}", "theta_star_100": r"100\,\theta_*",
                   "r_drag": r"r_{\rm drag}\,[\mathrm{Mpc}]", "r_star": r"r_*\,[\mathrm{Mpc}]", "z_star": r"z_*",
                   "z_drag": r"z_{\rm drag}", "Omega_Lambda": r"\Omega_{\rm DE}", "omega_nu": r"\omega_\nu"}
    SETTINGS = SETTINGS
    #: Fixed physical inputs a fiducial point may give (the mock generator passes them on as settings).
    point_settings = ("sum_mnu_eV", "n_eff")

    def __init__(self, ell_max: int, settings: dict, where: str = "[theory]"):
        super().__init__(ell_max)
        if self.ell_max < 2:
            raise UserError(f"{where}: the data need ell_max = {self.ell_max}; CAMB needs at least 2")
        self.where = where
        self.settings = self.check_settings(settings, where)
        preset = ACCURACY_PRESETS[self.settings["accuracy"]]

        import camb  # deferred: see the module docstring (OMP_NUM_THREADS)
        from camb import bbn
        from camb.baseconfig import CAMBParamRangeError

        self._camb = camb
        self._range_error = CAMBParamRangeError
        camb.set_feedback_level(0)
        self._bbn = bbn.get_predictor()
        self._bbn_table = str(getattr(self._bbn, "interpolation_table", type(self._bbn).__name__))
        self._ombh2_range = (float(min(self._bbn.ombh2s)), float(max(self._bbn.ombh2s)))
        dn = self.settings["n_eff"] - STANDARD_N_EFF
        dn_lo, dn_hi = float(min(self._bbn.deltans)), float(max(self._bbn.deltans))
        self._dn_range = (dn_lo, dn_hi)
        if not dn_lo <= dn <= dn_hi:
            raise UserError(f"{where}: n_eff = {self.settings['n_eff']} is outside the BBN table used for the "
                            f"helium fraction ({STANDARD_N_EFF + dn_lo:.3f} … {STANDARD_N_EFF + dn_hi:.3f})")

        # Everything that does not depend on the parameters is set once and copied per point. (Speed is not
        # the reason: copy + set_cosmology and a build from scratch both take ≈0.1 ms of a ≈2 s call.)
        base = camb.CAMBparams()
        base.WantScalars, base.WantTensors, base.DoLensing = True, False, True
        base.set_accuracy(AccuracyBoost=preset["AccuracyBoost"], lAccuracyBoost=preset["lAccuracyBoost"])
        base.NonLinearModel.set_params(halofit_version=HALOFIT_VERSION)
        base.set_for_lmax(self.ell_max, lens_potential_accuracy=preset["lens_potential_accuracy"],
                          lens_output_margin=self.settings["ell_margin"])
        base.set_matter_power(redshifts=(0.0,), kmax=SIGMA8_KMAX, silent=True)
        base.Transfer.high_precision = preset["transfer_high_precision"]
        self._base = base
        self._version = str(camb.__version__)

    def describe(self) -> dict:
        """Every setting that changes the prediction (plain values, for the chain file)."""
        preset = ACCURACY_PRESETS[self.settings["accuracy"]]
        return {
            "code": "camb",
            "camb_version": self._version,
            "ell_max": self.ell_max,
            "accuracy": self.settings["accuracy"],
            "lens_potential_accuracy": preset["lens_potential_accuracy"],
            "AccuracyBoost": preset["AccuracyBoost"],
            "lAccuracyBoost": preset["lAccuracyBoost"],
            "ell_margin": self.settings["ell_margin"],
            "nonlinear_lensing": HALOFIT_VERSION if preset["lens_potential_accuracy"] > 0 else "none",
            "sum_mnu_eV": self.settings["sum_mnu_eV"],
            "neutrino_masses": self.settings["neutrino_masses"],
            "n_eff": self.settings["n_eff"],
            "T_cmb_K": T_CMB_K,
            "YHe": "BBN " + self._bbn_table.replace("\\", "/").rsplit("/", 1)[-1],
            "sigma8_kmax_per_Mpc": SIGMA8_KMAX,
            "sigma8_high_precision": preset["transfer_high_precision"],
            "tau_min": TAU_MIN,
            "theta_H0_min": THETA_H0_RANGE[0],
            "theta_H0_max": THETA_H0_RANGE[1],
        }

    def versions(self) -> dict[str, str]:
        return {"camb": self._version}

    def __reduce__(self):
        # CAMB's parameter structures do not pickle; a worker rebuilds the backend from its settings.
        given = {k: self.settings[k] for k in DEFAULTS}
        return (type(self), (self.ell_max, given, self.where))

    # -- one point --------------------------------------------------------------------------------------

    def _cosmology(self, params: dict) -> tuple[dict, dict, dict]:
        """Our parameters → (set_cosmology keywords, InitPower keywords, dark-energy keywords or {});
        `TheoryError` for points CAMB must not see."""
        missing = [n for n in self.required if n not in params]
        given = [n for n in self.one_of if n in params]
        if missing or len(given) != 1:
            raise ValueError(f"CambTheory.compute needs {', '.join(self.required)} and exactly one of "
                             f"{', '.join(self.one_of)}; got {', '.join(sorted(params))}")
        vals = {n: float(params[n]) for n in self.required + tuple(given) + self.optional if n in params}
        bad = [n for n, v in vals.items() if not math.isfinite(v)]
        if bad:
            raise TheoryError("unphysical", f"non-finite {', '.join(bad)}")
        if vals["omega_c"] <= 0.0 or vals["omega_b"] <= 0.0:
            raise TheoryError("unphysical", f"omega_b = {vals['omega_b']}, omega_c = {vals['omega_c']} "
                                            "must be positive")
        mnu = vals.get("sum_mnu_eV", self.settings["sum_mnu_eV"])
        nnu = vals.get("n_eff", self.settings["n_eff"])
        degenerate = self.settings["neutrino_masses"] == "degenerate"
        if mnu < 0.0 or nnu <= 0.0:
            raise TheoryError("unphysical", f"sum_mnu_eV = {mnu}, n_eff = {nnu}")
        if mnu > (MNU_MAX_DEGENERATE_EV if degenerate else MNU_MAX_EV):
            raise TheoryError("outside-code-range", f"sum_mnu_eV = {mnu} (see MNU_MAX_EV)")
        if "y_he" in vals:
            if not 0.01 <= vals["y_he"] <= 0.5:
                raise TheoryError("unphysical", f"y_he = {vals['y_he']} (need 0.01 … 0.5)")
        else:
            lo, hi = self._ombh2_range
            if not lo <= vals["omega_b"] <= hi:
                raise TheoryError("bbn-out-of-range", f"omega_b = {vals['omega_b']} outside the BBN table "
                                                      f"[{lo}, {hi}]")
            dn = nnu - STANDARD_N_EFF
            if not self._dn_range[0] <= dn <= self._dn_range[1]:
                raise TheoryError("bbn-out-of-range", f"n_eff = {nnu} outside the BBN table")
        if vals["tau"] < TAU_MIN:
            reason = "unphysical" if vals["tau"] <= 0.0 else "tau-out-of-range"
            raise TheoryError(reason, f"tau = {vals['tau']} (need tau >= {TAU_MIN})")
        ext = {k: vals.get(k, v) for k, v in OPTIONAL_DEFAULTS.items()}
        if abs(ext["omega_k"]) > OMEGA_K_MAX:
            raise TheoryError("outside-code-range", f"omega_k = {ext['omega_k']} (|Ω_k| ≤ {OMEGA_K_MAX} handled)")
        if ext["r"] < 0.0 or ext["a_lens"] < 0.0:
            raise TheoryError("unphysical", f"r = {ext['r']}, a_lens = {ext['a_lens']} must be ≥ 0")
        try:
            A_s = math.exp(vals["ln_As_1e10"]) * 1e-10
        except OverflowError:
            raise TheoryError("unphysical", f"ln_As_1e10 = {vals['ln_As_1e10']}") from None
        kw = {"ombh2": vals["omega_b"], "omch2": vals["omega_c"], "tau": vals["tau"], "mnu": mnu,
              "num_massive_neutrinos": (3 if degenerate else 1) if mnu > 0 else 0, "nnu": nnu,
              "standard_neutrino_neff": STANDARD_N_EFF, "TCMB": T_CMB_K, "omk": ext["omega_k"],
              "Alens": ext["a_lens"]}
        if degenerate:
            kw["neutrino_hierarchy"] = "degenerate"
        if "y_he" in vals:
            kw["YHe"] = vals["y_he"]
        else:
            kw.update(YHe=None, bbn_predictor=self._bbn)
        if "H0" in vals:
            if vals["H0"] <= 0.0:
                raise TheoryError("unphysical", f"H0 = {vals['H0']}")
            kw["H0"] = vals["H0"]
        else:
            theta = vals["theta_star_100"]
            if not 0.1 < theta < 10.0:
                raise TheoryError("theta-out-of-range", f"theta_star_100 = {theta}")
            kw["thetastar"] = theta / 100.0
            kw["theta_H0_range"] = THETA_H0_RANGE
        power = {"As": A_s, "ns": vals["n_s"], "nrun": ext["n_run"], "r": ext["r"]}
        dark = ({"w": ext["w0"], "wa": ext["wa"], "dark_energy_model": "ppf"}
                if "w0" in vals or "wa" in vals else {})
        return kw, power, dark

    def camb_params(self, params: dict):
        """CAMB's parameter structure for one point (a copy of the one built at set-up; also for benchmarks)."""
        kw, power, dark = self._cosmology(params)
        p = self._base.copy()
        try:
            if dark:                             # before set_cosmology: a θ_* → H₀ solve uses the dark energy
                p.set_dark_energy(**dark)
            if "r" in params:                    # tensors (primordial BB) only when the run gives r
                p.WantTensors = True
                p.max_l_tensor = min(self.ell_max, TENSOR_ELL_MAX)
                p.max_eta_k_tensor = 2.5 * p.max_l_tensor
            p.set_cosmology(**kw)
            p.InitPower.set_params(**power)
        except self._range_error as exc:
            reason = "theta-out-of-range" if "thetastar" in kw else "camb-error"
            raise TheoryError(reason, _short(exc)) from None
        except Exception as exc:  # noqa: BLE001 - CAMB must never leak an exception into the sampler
            raise TheoryError("camb-error", _short(exc)) from None
        return p

    def compute(self, params: dict) -> Spectra:
        """Lensed D_ℓ (μK², ℓ = 0 … ell_max; ℓ = 0, 1 are zero) and the derived values at one point."""
        p = self.camb_params(params)
        try:
            res = self._camb.get_results(p)
            cl = res.get_total_cls(self.ell_max, CMB_unit="muK", raw_cl=False)
            der = res.get_derived_params()
            sigma8 = float(res.get_sigma8_0())
            par = res.Params
            H0 = float(par.H0)
            omega_m = (float(par.ombh2) + float(par.omch2) + float(par.omnuh2)) / (H0 / 100.0) ** 2
            z_re = float(par.Reion.redshift)
            omega_de = float(res.get_Omega("de"))
        except Exception as exc:  # noqa: BLE001
            raise TheoryError("camb-error", _short(exc)) from None

        if cl.shape[0] < self.ell_max + 1:
            raise TheoryError("camb-error", f"CAMB returned spectra to ell = {cl.shape[0] - 1} only")
        dl = {}
        for kind in KINDS:
            col = np.array(cl[: self.ell_max + 1, _CAMB_KINDS[kind]], dtype=float)
            col[:2] = 0.0
            dl[kind] = col
        derived = {
            "H0": H0,
            "Omega_m": omega_m,
            "sigma_8": sigma8,
            "S_8": sigma8 * math.sqrt(omega_m / 0.3),
            "age_Gyr": float(der["age"]),
            "z_re": z_re,
            "theta_star_100": float(der["thetastar"]),
            "r_drag": float(der["rdrag"]),
            "r_star": float(der["rstar"]),
            "z_star": float(der["zstar"]),
            "z_drag": float(der["zdrag"]),
            "Omega_Lambda": omega_de,
            "omega_nu": float(par.omnuh2),
        }
        if not all(np.all(np.isfinite(v)) for v in dl.values()) or not all(map(math.isfinite, derived.values())):
            raise TheoryError("non-finite", "CAMB returned NaN or inf")
        if np.any(dl["TT"][2:] <= 0.0) or np.any(dl["EE"][2:] <= 0.0):
            raise TheoryError("camb-error", "non-positive TT or EE power")
        return Spectra(self.ell_max, dl, derived)
