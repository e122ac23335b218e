"""Boltzmann backends behind one interface (`base.Theory`), chosen by ``[theory] code``.

``camb``: CAMB (Lewis, Challinor & Lasenby 2000, ApJ 538, 473) through its Python API.
``templates``: an exactly solvable linear model (no Boltzmann code) for testing and learning the machinery.
"""
from __future__ import annotations

from ..errors import UserError
from .base import KINDS, Spectra, Theory, TheoryError

CODES = ("camb", "templates")

__all__ = ["KINDS", "Spectra", "Theory", "TheoryError", "make_theory", "CODES"]


def make_theory(settings: dict, ell_max: int, where: str = "[theory]") -> Theory:
    """Build the backend named by ``settings['code']``; the rest of ``settings`` goes to it."""
    rest = {k: v for k, v in settings.items() if k != "code"}
    code = settings.get("code")
    if code == "camb":
        from .camb import CambTheory
        return CambTheory(ell_max, rest, where)
    if code == "templates":
        from .templates import TemplateTheory
        return TemplateTheory(ell_max, rest, where)
    raise UserError(f"{where}: unknown 'code' = {code!r} (choose one of {', '.join(CODES)})")
