"""The interface between the likelihood and any Boltzmann backend.

A theory takes a mapping of parameter values and returns lensed CMB power spectra as
D_ℓ = ℓ(ℓ+1) C_ℓ / 2π in μK² (the convention of the trade, e.g. Hu & Dodelson 2002, ARA&A 40, 171)
on the integer grid ℓ = 0 … ℓ_max, together with derived quantities. A point the backend cannot compute
(an integration failure, an unphysical combination) raises `TheoryError` with a short reason; the
posterior turns it into log-posterior −∞ and counts the reason. Nothing here knows about samplers.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

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


class Theory:
    """Base class of every backend.

    Subclasses set ``inputs`` (names of the parameters they read, in the project's spelling),
    ``derived_names`` (names of the derived values they return, fixed order) and implement `compute`.
    ``ell_max`` is the highest multipole the dataset needs; backends compute at least that far.
    """

    inputs: tuple[str, ...] = ()
    derived_names: tuple[str, ...] = ()

    def __init__(self, ell_max: int):
        self.ell_max = int(ell_max)

    def compute(self, params: dict[str, float]) -> Spectra:  # pragma: no cover - interface
        raise NotImplementedError

    def describe(self) -> dict:
        """Settings that change the prediction (recorded in the chain file, compared on resume)."""
        return {"ell_max": self.ell_max}
