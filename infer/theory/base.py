"""The interface between the likelihood and any Boltzmann backend.

A theory takes a mapping of parameter values and returns lensed CMB power spectra as
D_ℓ = ℓ(ℓ+1) C_ℓ / 2π in μK² (the convention of the trade, e.g. Hu & Dodelson 2002, ARA&A 40, 171)
on the integer grid ℓ = 0 … ℓ_max, together with derived quantities. A point the backend cannot compute
(an integration failure, an unphysical combination) raises `TheoryError` with a short reason; the
posterior turns it into log-posterior −∞ and counts the reason. Nothing here knows about samplers.

Every backend declares, on its class (so callers never guess):

* ``required`` — parameters always read; ``one_of`` — a group of which exactly one is read (e.g. H₀ or
  θ_*), empty if none; ``optional`` — parameters read when the run gives them (sampled or fixed) and
  otherwise at the backend's own default (an extension of the base model such as Σm_ν or w₀); ``inputs`` =
  ``required + one_of + optional`` (set by the base class); `compute` receives the optional ones only when
  given;
* ``derived_names`` — derived values it returns (fixed order) and ``derived_tex`` their LaTeX labels;
* ``SETTINGS`` — its ``[theory]`` keys, each a `Setting` with a type, a range and a default, checked by
  `Theory.check_settings` when the run file is read (no backend library is imported for that), so a
  wrong type or an out-of-range value is one line naming the file and the key, before any theory call;
* ``point_settings`` — settings that a fiducial point may carry (fixed physical inputs such as Σm_ν that
  the backend takes as settings rather than parameters; used by the mock generator).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from infer import validate
from infer.errors import UserError

#: Spectrum kinds a theory may return, in this fixed order.
KINDS = ("TT", "TE", "EE", "BB")


class TheoryError(Exception):
    """The backend could not compute this point. ``reason`` is a short, countable label."""

    def __init__(self, reason: str, detail: str = ""):
        super().__init__(f"{reason}: {detail}" if detail else reason)
        self.reason = reason
        self.detail = detail


@dataclass
class Spectra:
    """Lensed D_ℓ in μK² indexed by ℓ (``dl[kind][ell]``, ℓ = 0 … ell_max) plus derived values."""

    ell_max: int
    dl: dict[str, np.ndarray]
    derived: dict[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class Setting:
    """One ``[theory]`` key: ``kind`` is "number", "integer", "choice", "bool" or "table"; numbers lie in
    [low, high] (open ends with ``low_open``/``high_open``; always finite); "choice" is one of
    ``choices``; a "table" is checked by ``check(where, key, value) -> value``. ``unit`` and ``help``
    document it. Absent keys take ``default`` (None: absent). ``run_control``: the key changes the cost of
    a call, never a prediction (so a resume may change it)."""

    kind: str
    default: object = None
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple = ()
    check: Callable | None = None
    unit: str = ""
    help: str = ""
    run_control: bool = False

    def validate(self, where: str, key: str, value):
        if self.kind in ("number", "integer"):
            integer = self.kind == "integer"
            if integer and isinstance(value, float) and value.is_integer():
                value = int(value)                              # 500.0 is a whole number of multipoles
            value = validate.number(where, key, value, integer=integer, low=self.low, high=self.high,
                                    low_open=self.low_open, high_open=self.high_open)
            return value if integer else float(value)
        if self.kind == "choice":
            return validate.choice(where, key, value, self.choices)
        if self.kind == "bool":
            return validate.boolean(where, key, value)
        if self.kind == "table":
            return self.check(where, key, value)
        raise ValueError(f"unknown setting kind {self.kind!r}")          # a bug in a backend's table


class Theory:
    """Base class of every backend: subclasses set the class attributes below and implement `compute`.

    ``ell_max`` is the highest multipole the dataset needs; backends compute at least that far.
    ``settings`` (given to subclasses' constructors) is the ``[theory]`` table without ``code``.
    """

    code: str = ""
    required: tuple[str, ...] = ()
    one_of: tuple[str, ...] = ()
    optional: tuple[str, ...] = ()
    inputs: tuple[str, ...] = ()
    derived_names: tuple[str, ...] = ()
    derived_tex: dict[str, str] = {}
    SETTINGS: dict[str, Setting] = {}
    point_settings: tuple[str, ...] = ()

    def __init_subclass__(cls, **kw):
        super().__init_subclass__(**kw)
        cls.inputs = tuple(cls.required) + tuple(cls.one_of) + tuple(cls.optional)
        missing = [n for n in cls.derived_names if n not in cls.derived_tex]
        if missing:
            raise TypeError(f"{cls.__name__} lacks LaTeX labels (derived_tex) for {missing}")
        unknown = [n for n in cls.point_settings if n not in cls.SETTINGS]
        if unknown:
            raise TypeError(f"{cls.__name__}.point_settings names unknown settings {unknown}")

    def __init__(self, ell_max: int):
        self.ell_max = int(ell_max)

    # -- declared interface ------------------------------------------------------------------------
    @classmethod
    def check_settings(cls, settings, where: str = "[theory]") -> dict:
        """Validated settings with defaults filled in, or `UserError` naming ``where`` and the key.
        Imports no backend library: this runs when the run file is read."""
        if not isinstance(settings, dict):
            raise UserError(f"{where}: expected a table of settings, got {type(settings).__name__}")
        for key in settings:
            if key not in cls.SETTINGS:
                raise UserError(f"{where}: unknown key '{key}' for code = \"{cls.code}\" "
                                f"(allowed: {', '.join(sorted(cls.SETTINGS)) or 'none'})")
        out = {}
        for key, spec in cls.SETTINGS.items():
            if key in settings:
                out[key] = spec.validate(where, key, settings[key])
            elif spec.default is not None:
                out[key] = spec.default
        return out

    @classmethod
    def missing_inputs(cls, given) -> list[str]:
        """Required inputs absent from ``given`` (a collection of names)."""
        return [n for n in cls.required if n not in given]

    @classmethod
    def chosen_inputs(cls, given) -> list[str]:
        """The ``one_of`` names present in ``given`` (exactly one is needed when ``one_of`` is not empty)."""
        return [n for n in cls.one_of if n in given]

    # -- one point ---------------------------------------------------------------------------------
    def compute(self, params: dict[str, float]) -> Spectra:  # pragma: no cover - interface
        raise NotImplementedError

    def describe(self) -> dict:
        """Settings that change the prediction (recorded in the chain file, compared on resume)."""
        return {"ell_max": self.ell_max}

    def versions(self) -> dict[str, str]:
        """Versions of the backend libraries (for the provenance record)."""
        return {}
