"""Boltzmann backends behind one interface (`base.Theory`), chosen by ``[theory] code``.

``camb``: CAMB (Lewis, Challinor & Lasenby 2000, ApJ 538, 473) through its Python API.
``class``: CLASS (Blas, Lesgourgues & Tram 2011, JCAP 07, 034) through ``classy``, the same parameter names.
``templates``: an exactly solvable linear model (no Boltzmann code) for testing and learning the machinery.

A new backend is a `Theory` subclass in its own module, registered in `_MODULES`; importing this package
loads no backend library (CAMB is imported when a `CambTheory` is built).
"""
from __future__ import annotations

import importlib

from infer.errors import UserError
from infer.theory.base import KINDS, Setting, Spectra, Theory, TheoryError

#: code → (module, class) of each backend.
_MODULES = {"camb": ("infer.theory.camb", "CambTheory"), "class": ("infer.theory.classy", "ClassTheory"),
            "templates": ("infer.theory.templates", "TemplateTheory")}
CODES = tuple(_MODULES)

__all__ = ["KINDS", "Setting", "Spectra", "Theory", "TheoryError", "CODES", "check_settings", "make_theory",
           "run_control_keys", "theory_at_point", "theory_class"]


def theory_class(code, where: str = "[theory]") -> type[Theory]:
    """The backend class for ``code`` (no backend library is loaded)."""
    if not isinstance(code, str) or code not in _MODULES:
        raise UserError(f"{where}: unknown 'code' = {code!r} (choose one of {', '.join(CODES)})")
    module, name = _MODULES[code]
    return getattr(importlib.import_module(module), name)


def check_settings(settings, where: str = "[theory]") -> dict:
    """A ``[theory]`` table checked by its backend's declared settings (types and ranges), with defaults
    filled in and ``code`` kept; one-line `UserError` naming ``where`` and the key otherwise. For the run
    file reader: no backend library is imported."""
    if not isinstance(settings, dict):
        raise UserError(f"{where}: must be a table")
    cls = theory_class(settings.get("code"), where)
    rest = {k: v for k, v in settings.items() if k != "code"}
    return {"code": settings["code"], **cls.check_settings(rest, where)}


def run_control_keys() -> tuple[str, ...]:
    """``theory.KEY`` of every backend setting that changes cost only, never a prediction (a resume may
    change these)."""
    keys = set()
    for code in CODES:
        keys.update(f"theory.{k}" for k, v in theory_class(code).SETTINGS.items() if v.run_control)
    return tuple(sorted(keys))


def make_theory(settings: dict, ell_max: int, where: str = "[theory]") -> Theory:
    """Build the backend named by ``settings['code']``; the rest of ``settings`` goes to it."""
    cls = theory_class(settings.get("code"), where)
    return cls(ell_max, {k: v for k, v in settings.items() if k != "code"}, where)


def theory_at_point(settings: dict, point: dict, ell_max: int, where: str = "[theory]",
                    point_where: str = "[fiducial]") -> tuple[Theory, dict]:
    """A backend for one fixed point (the mock generator's fiducial) and that point's inputs to it.

    Values of the backend's ``point_settings`` given in ``point`` (e.g. Σm_ν and N_eff for CAMB) become
    settings unless the settings give them already; the point must give every required input and exactly
    one of a ``one_of`` group (`UserError` naming ``point_where`` otherwise)."""
    cls = theory_class(settings.get("code"), where)
    merged = dict(settings)
    for key in cls.point_settings:
        if key in point and key not in merged:           # checked here so the message names the point
            merged[key] = cls.SETTINGS[key].validate(point_where, key, point[key])
    missing = cls.missing_inputs(point)
    if missing:
        raise UserError(f"{point_where} lacks {', '.join(missing)} needed by theory code '{cls.code}'")
    if cls.one_of and len(cls.chosen_inputs(point)) != 1:
        raise UserError(f"{point_where} must give exactly one of {', '.join(cls.one_of)} "
                        f"(theory code '{cls.code}')")
    theory = make_theory(merged, ell_max, where)
    return theory, {k: v for k, v in point.items() if k in cls.inputs}
