"""Figures of a run, one module each: `triangle`, `traces`, `convergence`, `bandpowers`, and `weights` for
the importance-weighted sample of the surrogate engine (in place of traces and convergence); `style` holds
the look (palette, fonts, layout), smoothing and credible levels shared by all of them.

Every figure has a ``*_figure`` builder returning a `matplotlib.figure.Figure` (for tests and for users
who want to restyle it) and a writer taking a path. Nothing here touches pyplot or global rcParams.
"""
from infer.report.figures.bandpowers import bandpowers, bandpowers_figure
from infer.report.figures.residuals import residuals, residuals_figure
from infer.report.figures.convergence import convergence, convergence_figure, convergence_history
from infer.report.figures.style import credible_levels, render
from infer.report.figures.traces import traces, traces_figure
from infer.report.figures.triangle import density_2d, triangle, triangle_figure
from infer.report.figures.weights import weights, weights_figure

__all__ = ["bandpowers", "bandpowers_figure", "residuals", "residuals_figure", "convergence", "convergence_figure", "convergence_history",
           "credible_levels", "density_2d", "render", "traces", "traces_figure", "triangle",
           "triangle_figure", "weights", "weights_figure"]
