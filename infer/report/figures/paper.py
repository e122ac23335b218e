"""Figures for a paper: a triangle (or single marginal) figure of chosen parameters at a journal's column width.

Widths are those of the common two-column journal layouts: single column ≈ 3.4 in, double (full page)
width ≈ 7.0 in (common practice; from memory of the usual author guidelines). The figure is exactly that
wide — drawn at that size, never cropped afterwards (no tight bounding box), so a PDF's MediaBox and a PNG's
pixels ÷ dpi are the requested width — and square for a triangle. Font sizes are set for the width (the
text of a single-column figure printed at 100 % is about 7–8 pt, the size of a caption's small print),
labels are mathtext (matplotlib's own TeX-like parser: no LaTeX installation is needed), fonts are the STIX
fonts of `infer.report.figures.style` embedded as TrueType (Type 42) in PDF, which journals accept.

The look is `style`'s (palette, smoothing, highest-density credible regions), extended by `PAPER`: sizes
per width, thinner lines, and a warm colour for a second quantity drawn beside the marginals (the profile
likelihood, `infer.report.figures.profile`). Draws come from a chain of either engine (`chain_draws`):
an ensemble chain after the automatic burn-in of `infer.analysis.burnin`, or the importance-weighted
exact sample of the surrogate engine, drawn with its weights (`infer.analysis.weighted`).
"""
from __future__ import annotations

import os
from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.ticker import MaxNLocator

from infer.errors import UserError
from infer.report.figures.style import (ACCENT, INK, STYLE, new_figure, plot_range)

#: Figure widths in inches.
WIDTHS = {"single": 3.4, "double": 7.0}
FORMATS = ("pdf", "png")
PNG_DPI = 300
#: Our palette, extended for paper figures: a warm ink for the profile likelihood beside the marginals.
from infer.report.figures.style import EMBER  # noqa: E402
#: Font sizes (pt) and line widths per width.
PAPER = {
    "single": {"font.size": 7.5, "axes.labelsize": 8.5, "xtick.labelsize": 6.5, "ytick.labelsize": 6.5,
               "legend.fontsize": 6.5, "axes.linewidth": 0.5, "xtick.major.size": 2.2, "ytick.major.size": 2.2,
               "xtick.minor.size": 1.2, "ytick.minor.size": 1.2, "lines.linewidth": 0.9},
    "double": {"font.size": 9.0, "axes.labelsize": 10.0, "xtick.labelsize": 8.0, "ytick.labelsize": 8.0,
               "legend.fontsize": 8.0, "axes.linewidth": 0.6, "xtick.major.size": 2.8, "ytick.major.size": 2.8,
               "xtick.minor.size": 1.5, "ytick.minor.size": 1.5, "lines.linewidth": 1.1},
}


def paper_style(width: str) -> dict:
    """`style.STYLE` with the sizes of ``width`` and fonts embedded as TrueType in PDF and PostScript."""
    return {**STYLE, **PAPER[width], "pdf.fonttype": 42, "ps.fonttype": 42, "text.usetex": False,
            "savefig.bbox": None}


# -- input -------------------------------------------------------------------------------------------------
def split_list(text: str) -> list[str]:
    """Split a comma-separated list, keeping commas inside braces ({b,0} stays one item)."""
    items, depth, cur = [], 0, ""
    for ch in text:
        depth += (ch == "{") - (ch == "}")
        if ch == "," and depth == 0:
            items.append(cur.strip())
            cur = ""
        else:
            cur += ch
    items.append(cur.strip())
    return items


def mathtext_label(text: str, where: str) -> str:
    """A label for matplotlib: ``$…$`` added when absent; refused in one line if mathtext cannot draw it."""
    from matplotlib.mathtext import MathTextParser
    lab = text if "$" in text else f"${text}$"
    try:
        MathTextParser("path").parse(lab)
    except Exception:  # mathtext raises ValueError / ParseException subclasses
        raise UserError(f"{where}: label {text!r} is not valid mathtext (matplotlib's TeX subset)") from None
    return lab


def check_output(path, fmt: str | None, replace: bool) -> tuple[Path, str]:
    """The output file and its format (from ``fmt`` or the suffix), checked before any work."""
    from infer import paths
    p = Path(path).expanduser().resolve()
    suffix = p.suffix.lower().lstrip(".")
    fmt = fmt or suffix
    if fmt not in FORMATS:
        raise UserError(f"{path}: the format must be one of {', '.join(FORMATS)} (from --format or the file name)")
    if suffix != fmt:
        raise UserError(f"{path}: the file name must end in .{fmt} for --format {fmt}")
    if p.is_dir():
        raise UserError(f"{path}: is a folder, not a file name")
    if os.path.lexists(p) and not replace:
        raise UserError(f"{p} already exists (pass --replace to overwrite it)")
    if os.path.lexists(p) and (p.is_symlink() or not p.is_file()):
        raise UserError(f"{p} is not a regular file; refusing to replace it")
    paths.file_folder(p)
    return p, fmt


def chain_draws(chain, burn: int | None = None):
    """(sample, run config, description) of a chain of either engine: a `Samples` after burn-in or a
    `WeightedSample`."""
    from infer.analysis import burnin
    from infer.analysis.weighted import WeightedSample
    from infer.config import stored
    from infer.store.chainfile import ChainStore
    from infer.store.enginefile import EngineFile, engine_of
    if not Path(chain).is_file():
        raise UserError(f"{chain}: no such chain file")
    if engine_of(chain) == "surrogate":
        if burn is not None:
            raise UserError("--burn applies to ensemble chains; a surrogate-engine sample has no burn-in")
        state = EngineFile(chain).read()
        if state.sample is None:
            raise UserError(f"{chain}: the surrogate engine has not produced a weighted sample yet")
        s = state.sample
        ws = WeightedSample(state.names, state.derived_names, s["position"], s["derived"], s["log_post"],
                            s["log_like"], s["log_weight"], dict(state.tex), dict(state.bounds), {})
        return ws, stored(state), f"{ws.n:,} exact draws with importance weights (Kish ESS {ws.ess:,.0f})"
    state = ChainStore(chain).read()
    if state.steps_done < 8:
        raise UserError(f"{chain}: only {state.steps_done} steps; too few to draw marginals")
    cfg = stored(state)
    if burn is not None and not 0 <= burn < state.steps_done:
        raise UserError(f"--burn must be between 0 and {state.steps_done - 1}, got {burn}")
    choice = burnin.choose(state.samples, burn, tau_multiple=cfg.stopping.tau_multiple, source="set with --burn")
    kept = state.samples.after(choice.burn)
    return kept, cfg, f"{kept.position.shape[0] * kept.position.shape[1] * kept.position.shape[2]:,} draws " \
                      f"after {choice.burn} steps of burn-in"


def columns_of(sample, names):
    """Finite draws of ``names`` (list of 1-D arrays) and their normalised weights (None: equal)."""
    from infer.analysis.weighted import WeightedSample
    cols = [np.asarray(sample.column(n), float).ravel() for n in names]
    ok = np.all([np.isfinite(c) for c in cols], axis=0)
    w = None
    if isinstance(sample, WeightedSample):
        w = sample.weights
        ok &= w > 0
        w = w[ok] / w[ok].sum()
    return [c[ok] for c in cols], w


# -- the figure --------------------------------------------------------------------------------------------
def paper_figure(sample, names, labels, width: str = "single"):
    """A triangle of ``names`` (one name: its marginal) labelled ``labels`` (mathtext), ``width`` wide."""
    from infer.report.figures.triangle import diag_panel, label_panel, pair_panel
    if width not in WIDTHS:
        raise UserError(f"--width must be one of {', '.join(WIDTHS)}, got {width!r}")
    names, n = list(names), len(names)
    cols, w = columns_of(sample, names)
    if cols[0].size < 2:
        raise UserError("the chain has fewer than two finite draws of these parameters")
    ranges = [plot_range(c, sample.bounds.get(nm), w) for c, nm in zip(cols, names)]
    W = WIDTHS[width]
    H = W if n > 1 else 0.72 * W
    with matplotlib.rc_context(paper_style(width)):
        fig = new_figure(W, H)
        fs = PAPER[width]["axes.labelsize"]
        left, bottom = (3.2 * fs) / 72 / W, (3.4 * fs) / 72 / H
        fig.subplots_adjust(left=left if n > 1 else 0.6 * left, bottom=bottom, right=1 - 0.05 / W,
                            top=1 - 0.05 / H, wspace=0.05, hspace=0.05)
        axes = fig.subplots(n, n, squeeze=False)
        for i in range(n):
            for j in range(n):
                ax = axes[i, j]
                if j > i:
                    ax.set_visible(False)
                    continue
                if i == j:
                    diag_panel(ax, cols[i], ranges[i], None, w)
                    ax.tick_params(left=False, right=False, which="both", labelleft=False)
                else:
                    pair_panel(ax, cols[j], cols[i], ranges[j], ranges[i], None, w)
                    ax.yaxis.set_major_locator(MaxNLocator(3 if width == "single" else 4, prune="both"))
                ax.set_xlim(ranges[j][0], ranges[j][1])
                ax.xaxis.set_major_locator(MaxNLocator(3 if width == "single" else 4, prune="both"))
                label_panel(ax, i, j, n, labels, rotate=n > 2)
        if n == 1:
            axes[0, 0].set_ylabel("posterior density (peak = 1)", color=INK)
    return fig


def write(fig, path, fmt: str, width: str) -> Path:
    """``fig`` written atomically as PDF or PNG (at `PNG_DPI`), at its own size."""
    from infer.atomic import write_atomic

    def fill(tmp):
        with matplotlib.rc_context(paper_style(width)):
            fig.savefig(tmp, format=fmt, dpi=PNG_DPI, metadata={"Creator": "infer"} if fmt == "png" else
                        {"Creator": "infer", "Producer": "infer (matplotlib)"})
    return write_atomic(path, fill)


__all__ = ["ACCENT", "EMBER", "PAPER", "WIDTHS", "chain_draws", "check_output", "mathtext_label", "paper_figure",
           "paper_style", "split_list", "write"]
