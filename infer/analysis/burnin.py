"""The run's two τ rules, in one place: how much of the chain is burn-in, and when τ can be trusted.

Burn-in
-------
Unless the user gives a number, the first ``ceil(BURN_FACTOR · τ_max)`` steps are discarded, never more
than half the run (`infer.analysis.diagnostics.burn_in`, the arithmetic). τ_max is the largest integrated
autocorrelation time (`diagnostics.autocorr_time`, walker-averaged; Goodman & Weare 2010, CAMCoS 5, 65;
Foreman-Mackey et al. 2013, PASP 125, 306) of *every* sampled and derived quantity whose draws are all
finite, measured on the whole run. A few τ of burn-in is common practice for ensemble samplers
(Foreman-Mackey et al. 2013, §6). A long run is thinned to at most ``max_steps`` steps (every k-th) before
τ is measured and the result multiplied by k: thinning by less than τ loses almost nothing and bounds
the cost of a check. The stopping rule, ``infer status`` and the summary all call `choose`.

The τ-multiple rule
-------------------
An estimate of τ from a run of T steps is trusted only when T > m · τ, with m the run's
``[stopping] tau_multiple`` (default 50, the rule of thumb of Foreman-Mackey et al. 2013 and the emcee
documentation; `diagnostics.autocorr_reliable` is the same test on an array of draws). On a shorter run
the windowed estimator is biased low, often far below the truth, and the effective sample sizes built on
the same autocorrelations are as unreliable; `tau_trusted` is the one test of it, used by the stopping
rule, the status report, the tables and the figures.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from infer.analysis import diagnostics

#: Burn-in = BURN_FACTOR × τ_max steps (at most half the run) when the user gives none.
BURN_FACTOR = 5.0
#: τ is measured on at most this many (evenly thinned) steps.
MAX_STEPS = 4000


def default_targets():
    """The run file's ``[stopping]`` defaults (`infer.config.Stopping`: R̂ 1.01, ESS 1000, 50 τ), the only
    default convergence targets anywhere in the analysis and the report."""
    from infer.config import Stopping
    return Stopping()


def tau_trusted(steps: int, tau: float, multiple: float) -> bool:
    """The τ-multiple rule: a run of ``steps`` steps supports the estimate ``tau`` when steps > multiple·τ.

    A non-finite τ (nothing measurable) is never trusted.
    """
    return bool(math.isfinite(tau) and steps > multiple * tau)


def tau_max(columns, max_steps: int = MAX_STEPS) -> float:
    """Largest τ over ``columns``, an iterable of (steps, ensembles, walkers) arrays (views are fine).

    Columns with any non-finite draw are left out; a long run is thinned to ``max_steps`` steps and
    τ rescaled (module docstring). ``nan`` when nothing can be measured. The maximum is taken in column
    order and a ``nan`` τ of a later column (a constant) is passed over, as the stopping rule always did.
    One column is copied at a time, never the whole chain.
    """
    taus, stride = [], 1
    for col in columns:
        steps, n_ens, n_walk = col.shape
        stride = max(1, steps // max_steps)
        if not np.isfinite(col).all():
            continue
        thin = col[::stride]
        taus.append(diagnostics.autocorr_time(thin.reshape(thin.shape[0], n_ens * n_walk).T))
    return stride * max(taus, default=math.nan)


def columns(samples):
    """Every sampled then derived quantity of ``samples`` as a (steps, E, W) view, in chain order."""
    return ([samples.position[..., i] for i in range(len(samples.names))]
            + [samples.derived[..., i] for i in range(len(samples.derived_names))])


@dataclass(frozen=True)
class BurnIn:
    """The burn-in chosen for a run and why."""

    burn: int                 # steps discarded
    steps: int                # steps in the run
    tau_max: float            # τ_max it was computed from (nan when given by the user)
    given: bool               # True when the user chose ``burn``
    tau_multiple: float       # the run's τ-multiple rule (for the wording)
    source: str = ""          # how the user gave it (e.g. "set with --burn")

    @property
    def capped(self) -> bool:
        return (not self.given and math.isfinite(self.tau_max)
                and self.burn < math.ceil(BURN_FACTOR * self.tau_max))

    @property
    def trusted(self) -> bool:
        """Whether τ_max behind an automatic burn-in obeys the τ-multiple rule."""
        return tau_trusted(self.steps, self.tau_max, self.tau_multiple)

    def rule(self) -> str:
        """One sentence for tables and reports (plain text, no trailing full stop)."""
        if self.given:
            return f"{self.source or 'given by the caller'}"
        if not math.isfinite(self.tau_max):
            return "automatic; no autocorrelation time could be measured, so half the run"
        if not self.trusted:
            return (f"automatic ({BURN_FACTOR:g} × τ_max, at most half the run), but τ_max is not yet "
                    f"measurable: the run ({self.steps} steps) is shorter than {self.tau_multiple:g} τ, so "
                    "the provisional τ_max and this burn-in are likely too small")
        text = (f"automatic: {BURN_FACTOR:g} × τ_max with τ_max = {self.tau_max:.3g} steps, the largest "
                "integrated autocorrelation time of any sampled or derived quantity over the whole run")
        return text + ("; capped at half the run" if self.capped else "")


def choose(samples, burn: int | None = None, *, tau_multiple: float | None = None,
           max_steps: int = MAX_STEPS, source: str = "") -> BurnIn:
    """The burn-in of ``samples`` (an `infer.analysis.samples.Samples`): automatic when ``burn`` is None.

    ``tau_multiple``: the run's τ-multiple rule (None: the `default_targets` value); ``source`` says how
    a given ``burn`` was chosen (e.g. "set with --burn")."""
    if tau_multiple is None:
        tau_multiple = default_targets().tau_multiple
    steps = int(samples.steps)
    if burn is not None:
        return BurnIn(int(burn), steps, math.nan, True, float(tau_multiple), source)
    t = tau_max(columns(samples), max_steps) if steps else math.nan
    return BurnIn(diagnostics.burn_in(t, steps, factor=BURN_FACTOR), steps, t, False, float(tau_multiple))
