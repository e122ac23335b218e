"""Lensed CMB spectra and derived parameters from CLASS, the second Boltzmann backend (``code = "class"``).

Method: the Boltzmann code CLASS (Lesgourgues 2011, arXiv:1104.2932; Blas, Lesgourgues & Tram 2011, JCAP 07,
034) through its Python wrapper ``classy`` (v3.4); lensed spectra by CLASS's curved-sky correlation-function
method. This module maps our parameter names (the same as the CAMB backend's) onto CLASS and turns every
CLASS failure into a countable `TheoryError`; the physics is CLASS's.

Assumptions (each recorded by `ClassTheory.describe`):

* T₀ = 2.7255 K (Fixsen 2009, ApJ 707, 916). Adiabatic scalar spectrum A_s (k/0.05 Mpc⁻¹)^(n_s−1+½ n_run ln)
  (CLASS ``alpha_s`` = ``n_run``); tensors (``modes = s,t``) when ``r`` is given, n_t from the
  consistency relation (CLASS ``n_t = scc``), pivot 0.05 Mpc⁻¹.
* Neutrinos: ``neutrino_masses = "one-massive"``: one ncdm species with Σm_ν and
  T_ncdm/T_γ = (4/11)^{1/3}(N_eff/3)^{1/4}, N_ur = 2 N_eff/3 (CAMB's convention: the massive state carries
  N_eff/3); ``"degenerate"``: three species of Σm_ν/3, N_ur = 0, T_ncdm scaled by (N_eff/3)^{1/4}.
* Y_He: CLASS's default BBN table (``YHe = BBN``) when ``y_he`` is absent, else ``YHe = y_he``.
* Dark energy: w₀/w_a given → ``Omega_Lambda = 0``, fluid with ``w0_fld``/``wa_fld`` and ``use_ppf = yes``
  (Fang, Hu & Lewis 2008). Ω_k → ``Omega_k``.
* A_lens: CLASS 3.4 has no input that scales the lensing potential in the lensed spectra (its source has no
  such parameter), so ``a_lens`` is not an input of this backend: a run file that gives it is refused in
  one line by the posterior's name check, before any CLASS call.
* Reionization: CLASS's ``reio_camb`` tanh model (width 0.5, helium at z = 3.5, width 0.4), as CAMB's.
* θ_*: not an input of this backend (give H0). CLASS's derived ``100*theta_star`` is reported as
  ``theta_star_100``, but it is not CAMB's θ_*: measured at the fiducial ΛCDM point it is 1.04429 against
  CAMB's 1.04124 (0.29 % higher, ten times the statistical error of a modern θ_* measurement), so a θ_*
  input would not map to the same cosmology in both codes until the definitions are reconciled.
* Failures: ``CosmoComputationError``/``CosmoSevereError`` → ``TheoryError("class-error", detail)``;
  ``struct_cleanup()`` after every point. A crash inside CLASS kills only its worker process
  (`infer.parallel.pool` isolates workers).

Accuracy presets (``accuracy``): ``fast`` (linear lensing potential, l_max = ℓ_max + 500), ``standard``
(HMcode-2020 non-linear lensing, P_k_max 5 Mpc⁻¹), ``high`` (``standard`` + CLASS's
``accurate_lensing = 1`` and larger ℓ margin). Measured against ``high`` at the fiducial: not yet (see the
report of issue 11; to be filled from ``benchmarks/bench_crosscode.py``).
"""
from __future__ import annotations

import math

import numpy as np

from infer.errors import UserError
from infer.theory.base import KINDS, Setting, Spectra, Theory, TheoryError

T_CMB_K = 2.7255
STANDARD_N_EFF = 3.044
TAU_MIN = 0.01

ACCURACY_PRESETS = {
    "fast": {"margin": 500, "non_linear": None, "extra": {}},
    "standard": {"margin": 500, "non_linear": "hmcode", "extra": {}},
    "high": {"margin": 1000, "non_linear": "hmcode", "extra": {"accurate_lensing": 1}},
}

SETTINGS = {
    "accuracy": Setting("choice", "standard", choices=tuple(ACCURACY_PRESETS), help="accuracy preset"),
    "neutrino_masses": Setting("choice", "one-massive", choices=("one-massive", "degenerate"),
                               help="how Σm_ν is shared among the neutrino eigenstates"),
    "sum_mnu_eV": Setting("number", 0.06, low=0.0, high=3.0, unit="eV", help="default Σm_ν"),
    "n_eff": Setting("number", STANDARD_N_EFF, low=0.0, low_open=True, high=10.0, help="default N_eff"),
}
DEFAULTS = {k: v.default for k, v in SETTINGS.items()}


def _short(exc, limit=300):
    text = f"{type(exc).__name__}: {' '.join(str(exc).split())}"
    return text if len(text) <= limit else text[: limit - 1] + "…"


class ClassTheory(Theory):
    """Lensed TT, TE, EE, BB and derived values from CLASS, with the CAMB backend's parameter names."""

    code = "class"
    required = ("omega_b", "omega_c", "ln_As_1e10", "n_s", "tau")
    one_of = ("H0",)
    optional = ("sum_mnu_eV", "n_eff", "y_he", "w0", "wa", "omega_k", "r", "n_run")
    derived_names = ("H0", "Omega_m", "sigma_8", "S_8", "age_Gyr", "z_re", "theta_star_100", "r_drag",
                     "r_star", "z_star", "z_drag", "Omega_Lambda", "omega_nu")
    derived_tex = {"H0": r"H_0", "Omega_m": r"\Omega_{\rm m}", "sigma_8": r"\sigma_8", "S_8": r"S_8",
                   "age_Gyr": r"t_0\,[\mathrm{Gyr}]", "z_re": r"z_{\rm re}", "theta_star_100": r"100\,\theta_*",
                   "r_drag": r"r_{\rm drag}", "r_star": r"r_*", "z_star": r"z_*", "z_drag": r"z_{\rm drag}",
                   "Omega_Lambda": r"\Omega_\Lambda", "omega_nu": r"\omega_\nu"}
    SETTINGS = SETTINGS
    point_settings = ("sum_mnu_eV", "n_eff")

    def __init__(self, ell_max: int, settings: dict, where: str = "[theory]"):
        super().__init__(ell_max)
        if self.ell_max < 2:
            raise UserError(f"{where}: the data need ell_max = {self.ell_max}; CLASS needs at least 2")
        self.where = where
        self.settings = self.check_settings(settings, where)
        from classy import Class, CosmoComputationError, CosmoSevereError  # deferred (threads)
        import classy
        self._Class, self._errors = Class, (CosmoComputationError, CosmoSevereError)
        self._version = str(getattr(classy, "__version__", "?"))
        self._cosmo = Class()

    def describe(self) -> dict:
        p = ACCURACY_PRESETS[self.settings["accuracy"]]
        return {"code": "class", "class_version": self._version, "ell_max": self.ell_max,
                "accuracy": self.settings["accuracy"], "l_max_margin": p["margin"],
                "nonlinear_lensing": "hmcode2020" if p["non_linear"] else "none",
                "neutrino_masses": self.settings["neutrino_masses"], "sum_mnu_eV": self.settings["sum_mnu_eV"],
                "n_eff": self.settings["n_eff"], "T_cmb_K": T_CMB_K, "YHe": "BBN (CLASS default table)",
                "tau_min": TAU_MIN}

    def versions(self):
        return {"classy": self._version}

    def __reduce__(self):
        return (type(self), (self.ell_max, dict(self.settings), self.where))

    # -- one point --------------------------------------------------------------------------------------
    def class_input(self, params: dict) -> dict:
        """Our parameters → CLASS's input dictionary (without H₀/θ); `TheoryError` for refused points."""
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
            raise TheoryError("unphysical", "omega_b and omega_c must be positive")
        if v["tau"] < TAU_MIN:
            raise TheoryError("unphysical" if v["tau"] <= 0 else "tau-out-of-range", f"tau = {v['tau']}")
        mnu = v.get("sum_mnu_eV", self.settings["sum_mnu_eV"])
        neff = v.get("n_eff", self.settings["n_eff"])
        if mnu < 0 or neff <= 0:
            raise TheoryError("unphysical", f"sum_mnu_eV = {mnu}, n_eff = {neff}")
        r = v.get("r")
        pre = ACCURACY_PRESETS[self.settings["accuracy"]]
        inp = {"output": "tCl,pCl,lCl,mPk", "lensing": "yes", "l_max_scalars": self.ell_max + pre["margin"],
               "omega_b": v["omega_b"], "omega_cdm": v["omega_c"], "A_s": math.exp(v["ln_As_1e10"]) * 1e-10,
               "n_s": v["n_s"], "tau_reio": v["tau"], "T_cmb": T_CMB_K, "alpha_s": v.get("n_run", 0.0),
               "YHe": v["y_he"] if "y_he" in v else "BBN", "Omega_k": v.get("omega_k", 0.0),
               "reio_parametrization": "reio_camb", "reionization_width": 0.5,
               "helium_fullreio_redshift": 3.5, "helium_fullreio_width": 0.4, "P_k_max_1/Mpc": 5.0,
               **pre["extra"]}
        if pre["non_linear"]:
            inp.update(non_linear="hmcode", hmcode_version="2020")
        if mnu > 0:
            t_scale = (4.0 / 11.0) ** (1.0 / 3.0) * (neff / 3.0) ** 0.25
            if self.settings["neutrino_masses"] == "one-massive":
                inp.update(N_ncdm=1, m_ncdm=mnu, T_ncdm=t_scale, N_ur=neff - neff / 3.0)
            else:
                inp.update(N_ncdm=1, m_ncdm=mnu / 3.0, deg_ncdm=3, T_ncdm=t_scale, N_ur=0.0)
        else:
            inp.update(N_ur=neff, N_ncdm=0)
        if "w0" in v or "wa" in v:
            inp.update(Omega_Lambda=0.0, w0_fld=v.get("w0", -1.0), wa_fld=v.get("wa", 0.0), use_ppf="yes")
        if r is not None:
            if r < 0:
                raise TheoryError("unphysical", f"r = {r}")
            inp.update(modes="s,t", r=max(r, 1e-30), n_t="scc", l_max_tensors=min(self.ell_max + 500, 3000))
        return inp

    def _run(self, inp: dict):
        c = self._cosmo
        c.set(inp)
        try:
            c.compute()
        except self._errors as exc:
            c.struct_cleanup()
            c.empty()
            raise TheoryError("class-error", _short(exc)) from None

    def compute(self, params: dict) -> Spectra:
        inp = self.class_input(params)
        inp["H0"] = float(params["H0"])
        self._run(inp)
        c = self._cosmo
        try:
            raw = c.lensed_cl(self.ell_max)
            names = ["age", "sigma8", "z_reio", "Omega_m", "100*theta_star", "rs_d", "rs_star", "z_star", "z_d",
                     "Omega_Lambda", "h"]
            d = c.get_current_derived_parameters(names)
            omega_nu = float(c.Omega_nu) * d["h"] ** 2
        except self._errors as exc:
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
        derived = {"H0": inp["H0"], "Omega_m": om, "sigma_8": s8, "S_8": s8 * math.sqrt(om / 0.3),
                   "age_Gyr": float(d["age"]), "z_re": float(d["z_reio"]), "theta_star_100": float(d["100*theta_star"]),
                   "r_drag": float(d["rs_d"]), "r_star": float(d["rs_star"]), "z_star": float(d["z_star"]),
                   "z_drag": float(d["z_d"]), "Omega_Lambda": float(d["Omega_Lambda"]),
                   "omega_nu": omega_nu}
        if not all(np.all(np.isfinite(x)) for x in dl.values()):
            raise TheoryError("non-finite", "CLASS returned NaN or inf")
        return Spectra(self.ell_max, dl, derived)
