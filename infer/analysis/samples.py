"""Samples of a run held in memory: the value object passed from the chain store to the summariser.

Shapes follow one convention everywhere: (steps, ensembles, walkers[, parameters]). An *ensemble* is one
affine-invariant/differential-evolution ensemble of walkers (Goodman & Weare 2010, CAMCoS 5, 65); several
ensembles with their own seeds and starting balls are independent chains in the sense of R̂, the walkers
inside one ensemble are not.

The four per-step arrays are named by `DRAWS`, the one list of them that the driver, the chain stores,
salvage and the summary share. `Samples.from_draws` is the one place a `Samples` is built; slicing
(`head`, `after`) goes through it too and gives views, never copies, of the arrays.
"""
from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

DRAWS = ("position", "log_post", "log_like", "derived")   # per step: (E,W,P), (E,W), (E,W), (E,W,D)


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

    @classmethod
    def from_draws(cls, names, derived_names, draws: Mapping[str, np.ndarray], *, tex=None, bounds=None,
                   meta=None) -> "Samples":
        """Samples from the `DRAWS` arrays (each shaped (steps, E, W[, ·])), which are used as given."""
        missing = [k for k in DRAWS if k not in draws]
        if missing:
            raise ValueError(f"draws lack {', '.join(missing)}")
        steps = {k: np.shape(draws[k])[0] for k in DRAWS}
        if len(set(steps.values())) != 1:
            raise ValueError(f"draws of different lengths: {steps}")
        return cls(tuple(names), tuple(derived_names), draws["position"], draws["derived"], draws["log_post"],
                   draws["log_like"], dict(tex or {}), dict(bounds or {}), dict(meta or {}))

    @property
    def steps(self) -> int:
        return self.position.shape[0]

    @property
    def all_names(self) -> tuple[str, ...]:
        return tuple(self.names) + tuple(self.derived_names)

    @property
    def draws(self) -> dict[str, np.ndarray]:
        """The `DRAWS` arrays by name."""
        return {k: getattr(self, k) for k in DRAWS}

    def column(self, name: str) -> np.ndarray:
        """Values of one sampled or derived quantity, shaped (steps, E, W) (a view)."""
        if name in self.names:
            return self.position[..., self.names.index(name)]
        if name in self.derived_names:
            return self.derived[..., self.derived_names.index(name)]
        raise KeyError(name)

    def rows(self, sl: slice) -> "Samples":
        """The steps ``sl`` of these samples (views of the same arrays)."""
        return Samples.from_draws(self.names, self.derived_names, {k: a[sl] for k, a in self.draws.items()},
                                  tex=self.tex, bounds=self.bounds, meta=self.meta)

    def head(self, n: int) -> "Samples":
        """The first ``n`` steps."""
        return self.rows(slice(0, n))

    def after(self, burn: int) -> "Samples":
        """The same samples without the first ``burn`` steps."""
        return self.rows(slice(burn, None))

    def label(self, name: str) -> str:
        return self.tex.get(name, name.replace("_", r"\_"))
