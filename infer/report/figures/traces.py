"""Walker traces: the log-posterior and every sampled parameter against step, burn-in shaded.

One colour per ensemble; an even selection of walkers and of steps keeps the figure light, and its
subtitle says what is shown. The y range comes from the kept draws, so far-off starting points do not
flatten the traces. The burn-in shaded is the one chosen by `infer.analysis.burnin`.
"""
from __future__ import annotations

import math

import matplotlib
import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import MaxNLocator

from infer.analysis.samples import Samples
from infer.report.figures.style import label as tex_label
from infer.report.figures.style import ENSEMBLE_COLOURS, INK, SAND, STYLE, new_figure, save

def traces(samples: Samples, path, burn: int, max_walkers: int = 12, max_points: int = 1500) -> None:
    """`traces_figure` written to ``path`` as PNG."""
    save(traces_figure(samples, burn, max_walkers, max_points), path, dpi=150)


def traces_figure(samples: Samples, burn: int, max_walkers: int = 12, max_points: int = 1500) -> Figure:
    """Walker traces of the log-posterior and every sampled parameter against step.

    One colour per ensemble; at most ``max_walkers`` walkers per ensemble (evenly chosen) and about
    ``max_points`` steps per walker (every k-th step) are drawn, as the title states. The discarded
    burn-in is shaded.
    """
    steps, n_ens, n_walk, _ = samples.position.shape
    stride = max(1, int(math.ceil(steps / max_points)))
    t = np.arange(0, steps, stride)
    walkers = np.unique(np.linspace(0, n_walk - 1, min(n_walk, max_walkers)).round().astype(int))
    rows = [("log_post", "$\\ln\\,\\mathcal{P}$", samples.log_post)]
    rows += [(nm, tex_label(samples, nm), samples.column(nm)) for nm in samples.names]
    nrow = len(rows)
    alpha = max(0.25, min(0.8, 3.0 / len(walkers)))
    with matplotlib.rc_context(STYLE):
        fig = new_figure(8.2, 1.15 * nrow + 1.0)
        fig.subplots_adjust(left=0.12, right=0.98, top=1 - 0.75 / (1.15 * nrow + 1.0),
                            bottom=0.5 / (1.15 * nrow + 1.0), hspace=0.12)
        axes = fig.subplots(nrow, 1, sharex=True, squeeze=False)[:, 0]
        for ax, (name, label, vals) in zip(axes, rows):
            if burn > 0:
                ax.axvspan(0, burn, color=SAND, lw=0, zorder=0)
            v = vals[t]  # (len(t), E, W)
            for e in range(n_ens):
                colour = ENSEMBLE_COLOURS[e % len(ENSEMBLE_COLOURS)]
                seg = v[:, e, :][:, walkers]
                for line, w in zip(ax.plot(t, seg, color=colour, lw=0.45, alpha=alpha, rasterized=True),
                                   walkers):
                    line.set_gid(f"trace {name} ensemble {e} walker {w}")
            if burn > 0:
                ax.axvline(burn, color=INK, lw=0.7, ls=(0, (4, 2)))
            kept = vals[burn:]
            kept = kept[np.isfinite(kept)]
            if kept.size:
                # limits from the kept draws, so far-off starting points do not flatten the traces
                lo_k, hi_k = np.quantile(kept, [0.0005, 0.9995])
                span = hi_k - lo_k if hi_k > lo_k else (abs(hi_k) * 1e-3 or 1.0)
                if name == "log_post":
                    ax.set_ylim(lo_k - 1.0 * span, max(hi_k, float(kept.max())) + 0.1 * span)
                else:
                    ax.set_ylim(lo_k - 0.6 * span, hi_k + 0.6 * span)
            ax.set_ylabel(label)
            ax.yaxis.set_label_coords(-0.085, 0.5)
            ax.yaxis.set_major_locator(MaxNLocator(3))
            ax.set_xlim(0, max(steps - 1, 1))
        axes[-1].set_xlabel("step")
        shown = f"{len(walkers)} of {n_walk} walkers" if len(walkers) < n_walk else f"all {n_walk} walkers"
        every = f", one step in {stride}" if stride > 1 else ""
        fig.text(0.12, 1 - 0.12 / (1.15 * nrow + 1.0), "Walker traces", ha="left", va="top", fontsize=12,
                 color=INK)
        fig.text(0.12, 1 - 0.42 / (1.15 * nrow + 1.0),
                 f"{n_ens} ensemble{'s' if n_ens != 1 else ''} (one colour each), {shown} per ensemble{every}; "
                 f"shaded: {burn} burn-in steps discarded", ha="left", va="top", fontsize=9, color=INK)
        if n_ens > 1:
            handles = [Line2D([], [], color=ENSEMBLE_COLOURS[e % len(ENSEMBLE_COLOURS)], lw=1.5,
                              label=f"ensemble {e}") for e in range(min(n_ens, 8))]
            fig.legend(handles=handles, loc="upper right", ncol=min(n_ens, 4),
                       bbox_to_anchor=(0.98, 1 - 0.05 / (1.15 * nrow + 1.0)), fontsize=8)
    return fig


