"""The importance weights of a surrogate-engine run: where the weight sits, and how the sample grew.

This replaces the walker traces and the convergence history, which do not apply to an importance-weighted
sample. Three panels:

1. **Sorted weights.** Every normalised weight times the number of draws S (1 = an equal share) against
   its rank, on log–log axes, with the Pareto-smoothed tail of PSIS (the generalised Pareto fit to the M
   largest weights, Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25, 72; `infer.analysis.weights.psis`)
   and its k̂. A flat curve means every draw counts; a steep head means a few draws carry the estimate.
   Weights below `FLOOR` of an equal share fall below the axis (they carry almost nothing).
2. **Effective sample size against exact calls.** After each correction round: the Kish ESS of the final
   weights of the draws made so far, against every exact call of the run so far (fit and design
   included), with the ESS target and the line of one exact call per effective sample; refinements of
   the surrogate are marked.
3. **Each round's own k̂.** The Pareto k̂ of a round's weights against the surrogate that proposed it,
   with the bound (0.7) above which the engine refines the surrogate.

Panels 2 and 3 need the engine's record (`infer.analysis.weighted.engine_info`); without it they say so.
"""
from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, MaxNLocator

from infer.analysis import weights as wts
from infer.analysis.weighted import KHAT_MAX, WeightedSample
from infer.report.figures.style import (ACCENT, DEEP, GRID, INK, MIST, SAND, SHALLOW, STYLE, new_figure, plain,
                                        save)

_FAINT = "#9aa3ad"
#: Weights below this fraction of an equal share (1/S) are below the sorted-weights panel's axis.
FLOOR = 1e-3


def weights(ws: WeightedSample, path, engine: dict | None = None) -> None:
    """`weights_figure` written to ``path`` as PNG."""
    save(weights_figure(ws, engine), path, dpi=160)


def weights_figure(ws: WeightedSample, engine: dict | None = None) -> Figure:
    """The three panels of the module docstring for ``ws`` and the run's ``engine`` record (optional)."""
    lw = np.asarray(ws.log_weight, float)
    pos = np.isfinite(lw)
    S = int(pos.sum())
    w = np.sort(wts.normalised_weights(lw[pos]))[::-1]
    res = wts.psis(lw[pos])
    smoothed = np.sort(np.exp(res.log_weights))[::-1]
    ess = 1.0 / float(np.sum(w * w))
    khat_max = float((engine or {}).get("khat_max", KHAT_MAX))
    with matplotlib.rc_context(STYLE):
        fig = new_figure(11.6, 4.3)
        fig.subplots_adjust(left=0.065, right=0.985, top=0.78, bottom=0.14, wspace=0.3)
        ax1, ax2, ax3 = fig.subplots(1, 3)
        _sorted_panel(ax1, w, smoothed, res, S)
        rounds = list((engine or {}).get("rounds") or [])
        if rounds:
            _ess_panel(ax2, rounds, engine)
            _khat_panel(ax3, rounds, khat_max)
        else:
            for ax, what in ((ax2, "effective sample size by exact calls"), (ax3, "$\\hat{k}$ of each round")):
                ax.text(0.5, 0.5, f"no round history given:\n{what} not shown", ha="center", va="center",
                        transform=ax.transAxes, color=_FAINT, fontsize=9)
                ax.set_xticks([]), ax.set_yticks([])
        fig.text(0.065, 0.965, "Importance weights of the exact sample", ha="left", va="top", fontsize=12,
                 color=INK)
        k_text = f"{res.k_hat:.2f}" if math.isfinite(res.k_hat) else "not measurable"
        sub = (f"{S:,} exact draws with positive weight; Kish effective sample size {ess:,.0f} "
               f"({100 * ess / S:.0f} % of the draws); Pareto $\\hat{{k}}$ = {k_text} (reliable below "
               f"{min(res.threshold, khat_max):.2f})")
        if engine is not None and engine.get("exact_calls"):
            sub += f"; {int(engine['exact_calls']):,} exact calls in the run"
        fig.text(0.065, 0.905, sub, ha="left", va="top", fontsize=8.8, color=INK)
    return fig


def _sorted_panel(ax, w, smoothed, res, S):
    rank = np.arange(1, S + 1)
    ax.axhline(1.0, color=_FAINT, lw=0.8, ls=(0, (2, 2)), zorder=1)
    ax.text(0.98, 1.0, "equal share", transform=ax.get_yaxis_transform(), ha="right", va="bottom",
            fontsize=7.5, color=_FAINT)
    ax.plot(rank, w * S, "-", color=DEEP, lw=1.3, gid="sorted weights", label="normalised weight × S")
    m = int(res.tail_length)
    if m > 0 and math.isfinite(res.k_hat):
        ax.plot(rank[:m], smoothed[:m] * S, "-", color=ACCENT, lw=1.1, gid="pareto tail",
                label=f"Pareto-smoothed tail ({m} largest), $\\hat{{k}}$ = {res.k_hat:.2f}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    top = float(max(w[0], smoothed[0] if smoothed.size else 0.0) * S)
    ax.set_ylim(max(float(w[-1] * S), FLOOR) / 1.5, max(top, 1.0) * 2.0)   # shares below FLOOR are clipped
    ax.xaxis.set_major_formatter(FuncFormatter(plain))
    ax.set_xlabel("rank of the weight")
    ax.set_ylabel("weight × number of draws")
    ax.set_title("Sorted weights", loc="left", fontsize=9.5)
    ax.legend(loc="lower left", fontsize=7.5)
    ax.grid(True, which="major", color=GRID, lw=0.6)
    ax.set_axisbelow(True)


def _ess_panel(ax, rounds, engine):
    calls = np.array([r["calls_after"] for r in rounds], float)
    ess = np.array([r["ess_so_far"] for r in rounds], float)
    target = float(engine.get("ess_target", math.nan))
    refit = np.array([r["refit"] for r in rounds])
    for i in np.flatnonzero(np.diff(refit) != 0) + 1:               # a new surrogate from round i on
        ax.axvline(0.5 * (calls[i - 1] + calls[i]), color=SAND, lw=3.0, zorder=0)
    top = max(float(np.nanmax(calls)), target if math.isfinite(target) else 0.0) * 1.08
    ax.plot([0, top], [0, top], color=_FAINT, lw=0.8, ls=(0, (4, 2)), label="one exact call per effective sample")
    if math.isfinite(target):
        ax.axhspan(target, top * 10, color=MIST, lw=0, zorder=0)
        ax.axhline(target, color=ACCENT, lw=1.0, ls=(0, (5, 2)))
        ax.text(0.98, target, f"target ESS = {target:g} ", transform=ax.get_yaxis_transform(), color=ACCENT,
                va="top", ha="right", fontsize=8)
    ax.plot(calls, ess, "-o", color=DEEP, ms=3.5, lw=1.2, gid="ess by calls", label="Kish ESS of the draws so far")
    if (np.diff(refit) != 0).any():
        ax.plot([], [], color=SAND, lw=3.0, label="surrogate refined")
    ax.set_xlim(0, top)
    ax.set_ylim(0, max(float(np.nanmax(ess)), target if math.isfinite(target) else 0.0) * 1.25 + 1)
    ax.xaxis.set_major_locator(MaxNLocator(5, integer=True))
    ax.set_xlabel("exact calls so far (fit, design and correction)")
    ax.set_ylabel("weight effective sample size")
    ax.set_title("Effective sample size as exact calls grow", loc="left", fontsize=9.5)
    ax.legend(loc="best", fontsize=7.5)
    ax.grid(True, which="major", color=GRID, lw=0.6)
    ax.set_axisbelow(True)


def _khat_panel(ax, rounds, khat_max):
    k = np.array([r["khat"] for r in rounds], float)
    idx = np.arange(len(rounds))
    good = np.isfinite(k) & (k < khat_max)
    shown = np.where(np.isfinite(k), k, np.nan)
    lo = min(float(np.nanmin(shown)) if np.isfinite(shown).any() else 0.0, 0.0) - 0.1
    hi = max(float(np.nanmax(shown)) if np.isfinite(shown).any() else 1.0, khat_max) + 0.15
    ax.axhspan(lo, khat_max, color=MIST, lw=0, zorder=0)
    ax.axhline(khat_max, color=ACCENT, lw=1.0, ls=(0, (5, 2)))
    ax.text(0.98, khat_max, f"$\\hat{{k}}$ = {khat_max:g}: refine above ", transform=ax.get_yaxis_transform(),
            color=ACCENT, va="bottom", ha="right", fontsize=8)
    ax.plot(idx, shown, "-", color=SHALLOW, lw=0.9, zorder=1)
    ax.plot(idx[good], shown[good], "o", color=DEEP, ms=4.5, gid="round khat ok", label="usable")
    bad = ~good
    ax.plot(idx[bad], np.where(np.isfinite(k[bad]), k[bad], hi - 0.05), "o", color=ACCENT, mfc="white", ms=4.5,
            gid="round khat poor", label="too heavy a tail (or not measurable)")
    ax.set_ylim(lo, hi)
    ax.set_xlim(-0.5, len(rounds) - 0.5)
    ax.xaxis.set_major_locator(MaxNLocator(min(len(rounds), 8), integer=True))
    ax.set_xlabel("correction round")
    ax.set_ylabel("Pareto $\\hat{k}$ of the round's own weights")
    ax.set_title("Each round against its own surrogate", loc="left", fontsize=9.5)
    ax.legend(loc="best", fontsize=7.5)
    ax.grid(True, which="major", color=GRID, lw=0.6)
    ax.set_axisbelow(True)
