"""Shared fixtures: a small dataset for the exactly solvable template model, and run files around it."""
from __future__ import annotations

import os

# The test process runs the driver in-process (`main([...])`), so it gets the driver's BLAS default that
# `infer.cli` sets for the command: one BLAS thread unless exported. It must be set before NumPy loads,
# i.e. here (pytest itself loads no NumPy before this file). Without it a threaded BLAS on a loaded
# 2-core machine turned a 0.3 s Gaussian-process test into 38 s (measured, OpenBLAS 0.3.31).
for _var in ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import textwrap  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pytest  # noqa: E402

from infer import data as dataset  # noqa: E402
from infer.forecast import mock  # noqa: E402
from infer.theory.templates import NAMES, TemplateTheory  # noqa: E402

TRUTH = {"a_1": 1.0, "a_2": 1.0, "a_3": 1.0, "a_4": 1.0}


def make_quick_dataset(path: Path, seed: int = 7) -> Path:
    """A mock dataset (invented experiment) whose spectra are the template model at TRUTH."""
    exp = mock.Experiment(name="Templateville (invented test experiment)", fsky=0.05, noise_uK_arcmin=60.0,
                          beam_fwhm_arcmin=10.0, ell_min=30, ell_max=1029, bin_width=50,
                          spectra=("TT", "TE", "EE"))
    spectra = TemplateTheory(exp.ell_max + 2, {}).compute(TRUTH)
    dataset.write(mock.simulate(exp, spectra, seed=seed, realise=True), str(path))
    return path


@pytest.fixture(scope="session")
def quick_data(tmp_path_factory) -> Path:
    return make_quick_dataset(tmp_path_factory.mktemp("data") / "quick_bandpowers.h5")


def quick_config_text(data: Path, chain: Path, *, steps=400, walkers=16, ensembles=2, workers=0, seed=11,
                      moves="de-snooker", checkpoint_steps=25, check_every=50, theory_extra="",
                      stopping_extra="", priors=None) -> str:
    priors = priors or {n: "{ uniform = [0.0, 3.0] }" for n in NAMES}
    params = "\n".join(f"[parameters.{n}]\nprior = {priors[n]}\nguess = 1.0\nspread = 0.05\ntex = 'a_{i + 1}'\n"
                       for i, n in enumerate(NAMES))
    return textwrap.dedent(f"""\
        [run]
        name = "quick-test"
        seed = {seed}

        [dataset]
        file = "{data}"

        [theory]
        code = "templates"
        {theory_extra}

        [sampling]
        walkers = {walkers}
        ensembles = {ensembles}
        steps = {steps}
        moves = "{moves}"
        workers = {workers}
        checkpoint_steps = {checkpoint_steps}

        [stopping]
        check_every = {check_every}
        rhat_below = 1.01
        ess_above = 1e9
        {stopping_extra}

        [output]
        chain = "{chain}"
        """) + params


@pytest.fixture
def write_config(tmp_path, quick_data):
    """write_config(**options) -> (config path, chain path) in a fresh folder."""
    def make(name="run.toml", **options):
        chain = tmp_path / "chains" / (Path(name).stem + ".h5")
        path = tmp_path / name
        path.write_text(quick_config_text(quick_data, chain, **options))
        return path, chain
    return make


def analytic_posterior(data_path: Path):
    """Closed-form posterior of the template amplitudes under flat priors (linear-Gaussian model)."""
    data = dataset.load(data_path)
    theory = TemplateTheory(data.ell_max_needed, {})
    A = theory.design_matrix(data.kind, data.window_ell, data.window)
    cinv = np.linalg.inv(data.covariance)
    cov = np.linalg.inv(A.T @ cinv @ A)
    mean = cov @ A.T @ cinv @ data.value
    return mean, cov


def pytest_collection_modifyitems(config, items):
    """Every test that calls the real Boltzmann code is also slow: the fast tier (`-m "not slow"`) runs none."""
    for item in items:
        if item.get_closest_marker("camb") is not None and item.get_closest_marker("slow") is None:
            item.add_marker(pytest.mark.slow)


def gaussian_loglike_hessian(data, design, cov, theta0, h=0.5):
    """−(Fisher matrix) reference: the Hessian of scipy.stats.multivariate_normal.logpdf(data | design θ, C)
    at θ0 by central finite differences (exact for a mean linear in θ; an independent implementation of
    the Gaussian log-likelihood)."""
    from scipy import stats

    def loglike(theta):
        return stats.multivariate_normal.logpdf(data, mean=design @ theta, cov=cov)

    p = len(theta0)
    hess = np.empty((p, p))
    for i in range(p):
        for j in range(p):
            ei, ej = np.eye(p)[i] * h, np.eye(p)[j] * h
            hess[i, j] = (loglike(theta0 + ei + ej) - loglike(theta0 + ei - ej)
                          - loglike(theta0 - ei + ej) + loglike(theta0 - ei - ej)) / (4 * h * h)
    return hess
