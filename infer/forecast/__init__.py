"""Forecasts for invented experiments: one concept per module.

`experiment` (the `Experiment` spec and its TOML reader) → `knox` (beam-deconvolved white noise and the
Gaussian band-power covariance, Knox 1995, Phys. Rev. D 52, 4307) → `mock` (binned fiducial spectra
plus one Gaussian draw: a dataset like any other) and `fisher` (Fisher matrices of any band-power
model, Tegmark, Taylor & Heavens 1997, ApJ 480, 22).
"""
from __future__ import annotations

from infer.forecast.experiment import (FIDUCIAL_OPTIONAL, FIDUCIAL_REQUIRED, MAX_BANDS, Experiment,
                                       read_experiment)
from infer.forecast.fisher import NumericalFisher, fisher_matrix, numerical_fisher
from infer.forecast.knox import KnoxBands, knox_covariance, noise_dl
from infer.forecast.mock import simulate

__all__ = ["Experiment", "read_experiment", "FIDUCIAL_REQUIRED", "FIDUCIAL_OPTIONAL", "MAX_BANDS",
           "noise_dl", "KnoxBands", "knox_covariance", "simulate", "fisher_matrix", "numerical_fisher",
           "NumericalFisher"]
