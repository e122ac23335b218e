"""An exactly solvable stand-in for a Boltzmann code: spectra linear in four amplitudes.

D_ℓ^X(a) = Σ_k a_k T_k^X(ℓ) with fixed, smooth, invented templates T_k (shapes loosely like an acoustic
spectrum, but nothing physical). With a Gaussian band-power likelihood and uniform or normal priors the
posterior is Gaussian with a closed form (the linear-Gaussian model, e.g. Gelman et al. 2013, *Bayesian
Data Analysis*, 3rd ed., §14.2): Σ_post = (Aᵀ C⁻¹ A + Σ_prior⁻¹)⁻¹, μ_post = Σ_post (Aᵀ C⁻¹ d + Σ_prior⁻¹ μ_prior),
with A the binned templates (`design_matrix`). This is what the sampler machinery is tested against, and
what ``configs/quick.toml`` runs in seconds.

Fault injection (for robustness tests and drills, documented in the README): ``fault = { parameter = "a_1",
above = 1.2, action = "segfault" | "exit" | "error" }`` makes points beyond the threshold kill their own
process (SIGSEGV or ``os._exit``) or raise `TheoryError`; ``delay_seconds`` makes each call sleep, to
mimic a slow Boltzmann code.
"""
from __future__ import annotations

import math
import os
import signal
import time

import numpy as np

from infer import validate
from infer.errors import UserError
from infer.theory.base import KINDS, Setting, Spectra, Theory, TheoryError

NAMES = ("a_1", "a_2", "a_3", "a_4")
ACTIONS = ("segfault", "exit", "error")


def _templates(ell_max: int) -> dict[str, np.ndarray]:
    """(4, ℓ_max+1) template arrays per kind, in μK²."""
    ell = np.arange(ell_max + 1, dtype=float)

    def bump(centre, width):
        return np.exp(-0.5 * ((ell - centre) / width) ** 2)

    t = {k: np.zeros((4, ell_max + 1)) for k in KINDS}
    t["TT"][0] = 5000.0 * bump(220, 90)
    t["TT"][1] = 2500.0 * bump(540, 110) + 2400.0 * bump(810, 120)
    t["TT"][2] = 1200.0 * np.exp(-ell / 700.0) + 300.0 * bump(1100, 200)
    t["EE"][3] = 40.0 * bump(1000, 300) + 15.0 * bump(400, 100) + 0.5
    # |TE| ≤ 0.6 √(TT·EE) at the fiducial a = 1, so the fiducial spectra are a valid covariance.
    t["TE"][3] = 0.6 * np.sqrt(t["TT"][:3].sum(0) * t["EE"][3]) * np.sin(ell / 150.0)
    t["BB"][3] = 0.05 * bump(1000, 400)
    for k in KINDS:
        t[k][:, :2] = 0.0
    return t


def _check_fault(where: str, key: str, f) -> dict:
    shape = (f"{{ parameter = one of {', '.join(NAMES)}, above = number, action = one of {', '.join(ACTIONS)} }}")
    if (not isinstance(f, dict) or set(f) != {"parameter", "above", "action"} or f["parameter"] not in NAMES
            or f["action"] not in ACTIONS or not validate.is_number(f["above"]) or not math.isfinite(f["above"])):
        raise UserError(f"{where}: '{key}' must be {shape}, got {f!r}")
    return f


class TemplateTheory(Theory):
    code = "templates"
    required = NAMES
    derived_names = ("a_sum",)
    derived_tex = {"a_sum": r"\Sigma a"}
    SETTINGS = {
        "delay_seconds": Setting("number", 0.0, low=0.0, high=86400.0, unit="s", run_control=True,
                                 help="sleep per call, to mimic a slow Boltzmann code"),
        "fault": Setting("table", check=_check_fault, help="fault injection (see the module docstring)"),
    }

    def __init__(self, ell_max: int, settings: dict, where: str = "[theory]"):
        super().__init__(ell_max)
        checked = self.check_settings(settings, where)
        self.delay = checked["delay_seconds"]
        self.fault = checked.get("fault")
        self.t = _templates(self.ell_max)

    def compute(self, params: dict[str, float]) -> Spectra:
        a = np.array([params[n] for n in NAMES])
        if self.fault is not None and params[self.fault["parameter"]] > self.fault["above"]:
            action = self.fault["action"]
            if action == "segfault":
                os.kill(os.getpid(), signal.SIGSEGV)
            elif action == "exit":
                os._exit(3)
            raise TheoryError("injected-fault", f"{self.fault['parameter']} > {self.fault['above']}")
        if self.delay:
            time.sleep(self.delay)
        dl = {k: a @ self.t[k] for k in KINDS}
        return Spectra(self.ell_max, dl, {"a_sum": float(a.sum())})

    def design_matrix(self, kind: np.ndarray, window_ell: np.ndarray, window: np.ndarray) -> np.ndarray:
        """(N, 4) matrix A with model band powers = A a, for a dataset's kinds and windows."""
        out = np.empty((len(kind), 4))
        for k in np.unique(kind):
            rows = kind == k
            out[rows] = window[rows] @ self.t[k][:, window_ell].T
        return out

    def describe(self) -> dict:
        return {"ell_max": self.ell_max, "code": "templates", "fault": self.fault}
