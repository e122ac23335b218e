"""Samples of a run held in memory: the value object passed from the chain store to the summariser.

Shapes follow one convention everywhere: (steps, ensembles, walkers[, parameters]). An *ensemble* is one
affine-invariant/differential-evolution ensemble of walkers (Goodman & Weare 2010, CAMCoS 5, 65); several
ensembles with their own seeds and starting balls are independent chains in the sense of R̂, the walkers
inside one ensemble are not.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class Samples:
    names: tuple[str, ...]                 # sampled parameters, in vector order
    derived_names: tuple[str, ...]         # derived quantities, in blob order
    position: np.ndarray                   # (steps, E, W, P)
    derived: np.ndarray                    # (steps, E, W, D)
    log_post: np.ndarray                   # (steps, E, W)
    log_like: np.ndarray                   # (steps, E, W)
    tex: dict[str, str] = field(default_factory=dict)        # LaTeX label per name (math mode, no $)
    bounds: dict[str, tuple[float, float]] = field(default_factory=dict)  # prior support, sampled only
    meta: dict = field(default_factory=dict)  # run name, dataset, n_bins, stop reason, ... (plain values)

    @property
    def steps(self) -> int:
        return self.position.shape[0]

    @property
    def all_names(self) -> tuple[str, ...]:
        return tuple(self.names) + tuple(self.derived_names)

    def column(self, name: str) -> np.ndarray:
        """Values of one sampled or derived quantity, shaped (steps, E, W)."""
        if name in self.names:
            return self.position[..., self.names.index(name)]
        if name in self.derived_names:
            return self.derived[..., self.derived_names.index(name)]
        raise KeyError(name)

    def after(self, burn: int) -> "Samples":
        """The same samples without the first ``burn`` steps."""
        return Samples(self.names, self.derived_names, self.position[burn:], self.derived[burn:],
                       self.log_post[burn:], self.log_like[burn:], self.tex, self.bounds, dict(self.meta))

    def label(self, name: str) -> str:
        return self.tex.get(name, name.replace("_", r"\_"))
