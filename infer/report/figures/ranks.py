"""Rank histograms of a simulation-based calibration, one panel per parameter, and the coverage panel.

Each parameter's panel is the histogram of u = F̂(θ̃ | d̃), the (weighted) posterior CDF at the truth
over the mocks (`infer.forecast.calibrate`), in equal bins of [0, 1], against the band where a bin's
count falls with 99 % probability when the pipeline is calibrated, Binomial(N, 1/B) (the band of the
rank histograms of Talts, Betancourt, Simpson, Vehtari & Gelman 2018, arXiv:1804.06788; from memory). A U shape means posteriors
too narrow, a ∩ shape too wide, a slope a bias. The last panel is the coverage of the central 68 % and
95 % intervals per parameter with its binomial error, against the nominal mass.
"""
from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.mathtext import MathTextParser

from infer.report.figures.style import ACCENT, DEEP, GRID, INK, MIST, SHALLOW, STYLE, new_figure, save

_parser = MathTextParser("path")


def _label(name: str, tex: dict | None) -> str:
    t = (tex or {}).get(name)
    if t:
        try:
            _parser.parse(f"${t}$")
            return f"${t}$"
        except Exception:  # mathtext raises ValueError/ParseException subclasses
            pass
    return name


def ranks(verdict, path, tex: dict | None = None, note: str = "") -> None:
    """`ranks_figure` written to ``path`` as PNG."""
    save(ranks_figure(verdict, tex, note), path, dpi=160)


def ranks_figure(verdict, tex: dict | None = None, note: str = "") -> Figure:
    """Panels of the module docstring for an `infer.forecast.calibrate.Verdict`."""
    from infer.forecast.calibrate import LEVELS, binomial_band
    P, B, N = len(verdict.names), verdict.bins, verdict.n
    cols = min(P + 1, 3)
    rows = math.ceil((P + 1) / cols)
    lo, hi = binomial_band(N, B, 0.99)
    with matplotlib.rc_context(STYLE):
        fig = new_figure(3.4 * cols, 2.7 * rows + 0.5)
        fig.subplots_adjust(left=0.07, right=0.985, top=1 - 0.55 / (2.7 * rows + 0.5), bottom=0.1 / rows + 0.05,
                            wspace=0.28, hspace=0.5)
        axes = np.atleast_1d(fig.subplots(rows, cols)).ravel()
        edges = np.linspace(0.0, 1.0, B + 1)
        top = max(float(verdict.counts.max()), hi) * 1.18
        for j, name in enumerate(verdict.names):
            ax = axes[j]
            ax.axhspan(lo, hi, color=MIST, lw=0, zorder=0)
            ax.stairs(verdict.counts[:, j], edges, fill=True, color=SHALLOW, alpha=0.9, zorder=1)
            ax.stairs(verdict.counts[:, j], edges, color=DEEP, lw=1.1, zorder=2)
            for level in (lo, hi):
                ax.axhline(level, color=INK, lw=0.7, ls=(0, (3, 2)), zorder=3)
            ax.axhline(N / B, color=ACCENT, lw=1.0, zorder=3)
            ax.set_xlim(0, 1)
            ax.set_ylim(0, top)
            ax.set_xlabel(f"rank of the true {_label(name, tex)}")
            ax.set_ylabel("mocks per bin")
            ax.text(0.03, 0.96, f"χ² p = {verdict.p_value[j]:.3g}", transform=ax.transAxes, va="top", ha="left",
                    fontsize=8, color=INK)
        ax = axes[P]
        x = np.arange(P)
        for k, (level, colour, mark) in enumerate(zip(LEVELS, (DEEP, ACCENT), ("o", "s"))):
            off = (k - 0.5) * 0.18
            ax.axhline(level, color=colour, lw=0.8, ls=(0, (4, 3)))
            ax.errorbar(x + off, verdict.coverage[k], yerr=verdict.error[k], fmt=mark, ms=4, color=colour,
                        elinewidth=1.0, capsize=2, label=f"central {round(100 * level)} %")
        ax.set_xticks(x, [_label(n, tex) for n in verdict.names])
        ax.set_xlim(-0.6, P - 0.4)
        ax.set_ylim(max(0.0, min(0.5, float(np.nanmin(verdict.coverage - 3 * verdict.error)) - 0.05)), 1.02)
        ax.set_ylabel("coverage")
        ax.grid(axis="y", color=GRID, lw=0.6)
        ax.legend(loc="lower right")
        for ax in axes[P + 1:]:
            ax.set_visible(False)
        fig.suptitle(f"calibration over {N} mocks · dashed: 99 % band of Binomial({N}, 1/{B}), line: expected count"
                     + (f" · {note}" if note else ""), color=INK, fontsize=10)
    return fig


__all__ = ["ranks", "ranks_figure"]
