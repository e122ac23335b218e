"""Nuisance terms of the band-power model: what the sky and the instrument add to the CMB.

    m_b = c² · ( Σ_ℓ W_bℓ D_ℓ^{X_b}  +  Σ_k A_k F_kb )

with W_bℓ the band's window function, D_ℓ the theory's lensed spectrum, F_k the window-averaged template of
each additive foreground term and c the map-level calibration. Each term is a parameter of the run when it
appears under ``[parameters]`` (sampled or fixed) and otherwise sits at its default, which leaves the
model unchanged. Terms today:

* ``calibration`` (default 1) — a multiplicative map calibration c: band powers scale as c², since a
  power spectrum is quadratic in the map (common practice; e.g. the absolute-calibration parameter of
  satellite and ground-based CMB likelihoods).
* ``fg_tt_amp`` (default 0, μK²) — residual power of unresolved extragalactic point sources in TT:
  Poisson-distributed sources have a white angular spectrum, C_ℓ = const, hence D_ℓ = A (ℓ/3000)² with A
  the amplitude at the pivot ℓ = 3000 (common practice for the shot-noise term of CMB foreground models,
  e.g. Dunkley et al. 2013, JCAP 07, 025; cited from memory). Applied to TT bands only, averaged over each band's window.

The next terms (multi-frequency foregrounds: dust, SZ, CIB per frequency pair) go here as further
`ForegroundTerm` entries with their own templates; the likelihood needs no change.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

#: Calibration: a multiplicative parameter and its neutral value.
CALIBRATION = "calibration"


@dataclass(frozen=True)
class ForegroundTerm:
    """An additive term A · F_b: ``template(ell) -> D_ℓ per unit amplitude`` (μK²), on the bands of
    ``kinds`` only, window-averaged."""

    name: str
    default: float
    kinds: tuple[str, ...]
    template: Callable[[np.ndarray], np.ndarray]
    unit: str
    tex: str


def poisson_template(ell: np.ndarray) -> np.ndarray:
    """D_ℓ of a white (Poisson) C_ℓ, normalised to 1 at ℓ = 3000."""
    return (ell / 3000.0) ** 2


#: Additive terms, in the order their contributions are summed.
FOREGROUNDS = (
    ForegroundTerm("fg_tt_amp", 0.0, ("TT",), poisson_template, "μK²", r"A_{\rm PS}^{TT}"),
)

#: Every nuisance parameter and its default (neutral) value.
NUISANCE = {CALIBRATION: 1.0, **{t.name: t.default for t in FOREGROUNDS}}


class NuisanceModel:
    """The nuisance terms for one dataset: templates averaged over its windows once, applied per point."""

    def __init__(self, rows: dict[str, np.ndarray], windows: dict[str, np.ndarray], window_ell: np.ndarray,
                 n_bands: int):
        ell = np.asarray(window_ell).astype(float)
        self.templates = []
        for term in FOREGROUNDS:
            f = np.zeros(n_bands)
            shape = term.template(ell)
            for kind in term.kinds:
                if kind in rows:
                    f[rows[kind]] = windows[kind] @ shape
            self.templates.append((term.name, f))

    def apply(self, bands: np.ndarray, values: dict[str, float] | None = None) -> np.ndarray:
        """``bands`` (the binned theory, modified in place) with every term added, then calibrated."""
        nu = dict(NUISANCE, **(values or {}))
        for name, f in self.templates:
            if nu[name]:
                bands += nu[name] * f
        return bands * nu[CALIBRATION] ** 2
