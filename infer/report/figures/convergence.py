"""Convergence history: what the stopping rule would have said at growing prefixes of the run.

Each point is `infer.sampling.stopping.assess` on the first L steps, so it uses the one burn-in rule
(`infer.analysis.burnin`) and the run's own targets (`infer.config.Stopping`): largest R̂ (rank-normalised
split R̂) and smallest bulk/tail ESS (Vehtari et al. 2021, Bayesian Analysis 16, 667) over every sampled
and derived quantity. A prefix shorter than the τ-multiple rule (`burnin.tau_trusted`) has no
measurable τ, and ESS estimates built on the same autocorrelations are biased high there: those points
are drawn open and grey and labelled as not yet measurable, never as values to read off.
"""
from __future__ import annotations

import math
from dataclasses import replace

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter

from infer.analysis import burnin
from infer.analysis.burnin import default_targets
from infer.analysis.samples import Samples
from infer.report.figures.style import ACCENT, DEEP, GRID, INK, MIST, STYLE, new_figure, plain, save

_MIN_HISTORY_STEPS = 8
_FAINT = "#9aa3ad"


def _prefix(samples: Samples, end: int) -> Samples:
    return replace(samples, position=samples.position[:end], derived=samples.derived[:end],
                   log_post=samples.log_post[:end], log_like=samples.log_like[:end])


def convergence_history(samples: Samples, targets=None, n_points: int = 12) -> dict:
    """R̂, ESS and τ of ``n_points`` growing prefixes of the run, judged as the stopping rule judges them.

    Returns arrays "step" (prefix length L), "rhat_max", "ess_bulk_min", "ess_tail_min", "tau_max",
    "trusted" (τ obeys the τ-multiple rule, so the ESS may be read) and the int "ensembles";
    prefixes shorter than 8 steps are left out (too short to say anything).
    """
    from infer.sampling.stopping import assess
    targets = targets or default_targets()
    steps = samples.steps
    ends = np.unique(np.linspace(steps / n_points, steps, n_points).round().astype(int))
    keys = ("step", "rhat_max", "ess_bulk_min", "ess_tail_min", "tau_max", "trusted")
    out = {k: [] for k in keys}
    for end in ends:
        if end < _MIN_HISTORY_STEPS:
            continue
        v = assess(_prefix(samples, int(end)), targets)
        out["step"].append(int(end))
        out["rhat_max"].append(v.rhat_max if math.isfinite(v.rhat_max) else math.nan)
        out["ess_bulk_min"].append(v.ess_bulk_min if v.ess_bulk_min > 0 else math.nan)
        out["ess_tail_min"].append(v.ess_tail_min if v.ess_tail_min > 0 else math.nan)
        out["tau_max"].append(v.tau_max if math.isfinite(v.tau_max) else math.nan)
        out["trusted"].append(burnin.tau_trusted(int(end), v.tau_max, targets.tau_multiple))
    hist = {k: np.asarray(out[k], int if k == "step" else bool if k == "trusted" else float) for k in keys}
    hist["ensembles"] = samples.position.shape[1]
    hist["tau_multiple"] = float(targets.tau_multiple)
    return hist


def convergence(history: dict, path, targets=None) -> None:
    """`convergence_figure` written to ``path`` as PNG."""
    save(convergence_figure(history, targets), path, dpi=170)


def convergence_figure(history: dict, targets=None) -> Figure:
    """Largest R̂ − 1 (log axis, line at the target) and smallest bulk/tail ESS against step.

    ESS points of prefixes that fail the τ-multiple rule are open grey markers labelled as such.
    """
    targets = targets or default_targets()
    rhat_target, ess_target = float(targets.rhat_below), float(targets.ess_above)
    step = np.asarray(history["step"], float)
    rhat = np.asarray(history["rhat_max"], float)
    bulk = np.asarray(history["ess_bulk_min"], float)
    tail = np.asarray(history["ess_tail_min"], float)
    trusted = np.asarray(history.get("trusted", np.ones(step.size, bool)), bool)
    with matplotlib.rc_context(STYLE):
        fig = new_figure(6.4, 5.2)
        fig.subplots_adjust(left=0.13, right=0.97, top=0.86, bottom=0.1, hspace=0.1)
        ax1, ax2 = fig.subplots(2, 1, sharex=True)
        excess = np.clip(rhat - 1.0, 1e-5, None)
        ok = np.isfinite(excess)
        ax1.axhspan(1e-6, rhat_target - 1.0, color=MIST, lw=0, zorder=0)
        ax1.axhline(rhat_target - 1.0, color=ACCENT, lw=1.0, ls=(0, (5, 2)))
        ax1.text(0.985, (rhat_target - 1.0) * 1.08, f"target $\\hat{{R}}$ = {rhat_target:g}",
                 transform=ax1.get_yaxis_transform(), color=ACCENT, va="bottom", ha="right", fontsize=8.5,
                 zorder=1)
        ax1.plot(step[ok], excess[ok], "-o", color=DEEP, ms=3.5, lw=1.2, gid="rhat")
        ax1.set_yscale("log")
        top = max(float(np.nanmax(excess)) if ok.any() else 1.0, 3 * (rhat_target - 1.0))
        ax1.set_ylim(min(1e-4, float(np.nanmin(excess)) if ok.any() else 1e-4) * 0.6, top * 1.8)
        ax1.set_ylabel("largest $\\hat{R} - 1$")
        ax1.grid(True, which="major", color=GRID, lw=0.6)
        ax1.set_axisbelow(True)

        ax2.axhspan(ess_target, 1e12, color=MIST, lw=0, zorder=0)
        ax2.axhline(ess_target, color=ACCENT, lw=1.0, ls=(0, (5, 2)))
        ax2.text(0.985, ess_target * 0.97, f"target ESS = {ess_target:g}", transform=ax2.get_yaxis_transform(),
                 color=ACCENT, va="top", ha="right", fontsize=8.5, zorder=1)
        for vals, marker, colour, name in ((bulk, "o", DEEP, "bulk"), (tail, "s", "#5a4c9a", "tail")):
            good = np.isfinite(vals) & trusted
            ax2.plot(step[good], vals[good], "-" + marker, color=colour, ms=3.4, lw=1.2,
                     mfc=colour if name == "bulk" else "white", label=f"{name} ESS", gid=f"ess_{name}")
        shaky = ~trusted & (np.isfinite(bulk) | np.isfinite(tail))
        if shaky.any():
            low = np.fmin(bulk, tail)[shaky]
            ax2.plot(step[shaky], low, "o", ms=3.4, color=_FAINT, mfc="none", lw=0, gid="ess_unreliable",
                     label=f"not measurable yet (run < {history.get('tau_multiple', targets.tau_multiple):g} τ)")
        ax2.set_yscale("log")
        ax2.yaxis.set_major_formatter(FuncFormatter(plain))
        ax2.yaxis.set_minor_formatter(FuncFormatter(lambda v, _: plain(v, _) if str(int(round(
            v / 10 ** math.floor(math.log10(v))))) in "25" else ""))
        vals = np.concatenate([bulk[np.isfinite(bulk)], tail[np.isfinite(tail)], [ess_target]])
        vals = vals[vals > 0]
        ax2.set_ylim(vals.min() / 1.6, vals.max() * 1.8)
        ax2.set_ylabel("smallest ESS")
        ax2.set_xlabel("steps run")
        ax2.legend(loc="upper left")
        ax2.grid(True, which="major", color=GRID, lw=0.6)
        ax2.set_axisbelow(True)
        if step.size:
            ax2.set_xlim(0, step.max() * 1.03)
        note = " (one ensemble: R̂ tests stationarity only)" if history.get("ensembles") == 1 else ""
        fig.text(0.13, 0.965, "Convergence as the run grows", ha="left", va="top", fontsize=12, color=INK)
        fig.text(0.13, 0.925, "each point: the stopping rule's diagnostics of the run up to that step "
                 "(automatic burn-in), worst quantity" + note, ha="left", va="top", fontsize=8.5, color=INK)
    return fig
