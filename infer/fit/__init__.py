"""Best fit: the maximum of the posterior or the likelihood, its curvature and the quality of the fit.

Modules: `lm` (damped, bounded Levenberg–Marquardt with batched finite-difference Jacobians; knows no
cosmology), `bands` (the picklable factory of model band powers per point, for any evaluator),
`curvature` (Gauss–Newton Fisher and Laplace covariance), `bestfit` (the run's fit, its result object,
file and table).
"""
from __future__ import annotations

from infer.fit.bands import BandModel, BandModelFactory
from infer.fit.bestfit import FitResult, check_output, default_path, fit, table, write
from infer.fit.curvature import laplace
from infer.fit.lm import Options, minimize

__all__ = ["BandModel", "BandModelFactory", "FitResult", "Options", "check_output",
           "default_path", "fit", "laplace", "minimize", "table", "write"]
