"""Simulation-based calibration of the whole pipeline: prior draw → mock band powers → engine → rank.

The method is simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018,
arXiv:1804.06788; Cook, Gelman & Rubin 2006, J. Comput. Graph. Stat. 15, 675). If θ̃ is drawn from the
prior π and data d̃ from the likelihood p(d | θ̃), then θ̃ is a draw of the posterior p(θ | d̃), so the
posterior CDF at the truth, u = F(θ̃ | d̃), is uniform on [0, 1] for every parameter, and a central
credible interval of mass p holds the truth in a fraction p of the mocks. A pipeline whose posteriors are
too narrow, too wide or shifted shows it as a U-shaped, ∩-shaped or sloped histogram of u, and as
coverage off its nominal value.

Per mock i (one task; every random choice from ``numpy.random.SeedSequence([seed, SALT, i])``):

1. θ̃ from the run file's prior (uniform, normal, truncated normal: inverse CDF; fixed parameters stay);
2. d̃ = m(θ̃) + L z with m the run's own forward model over the whole dataset layout (theory, the
   dataset's windows, nuisance terms: `infer.fit.bands.BandModel`, so the generative model is exactly the
   likelihood the fit uses) and L L^T = C the spec's Knox covariance at the spec's fiducial
   (`infer.forecast.knox`, as the mock generator `infer.forecast.mock` draws it). For a top-hat dataset
   without nuisance terms m(θ̃) is the generator's noiseless band powers (tested);
3. the run file's engine on d̃, in this process (the surrogate engine in memory, or the ensemble driver
   on an in-memory chain with the summary's burn-in), with covariance ``fit_cov_scale`` × C in the fit
   (1 for a calibration; ≠ 1 miscalibrates on purpose, to see the test fail);
4. u_j = Σ_i w_i [θ_ij < θ̃_j] / Σ_i w_i over the posterior draws θ_i with weights w_i (importance
   weights of the surrogate engine; equal weights for MCMC draws), and the hits of the central 68 % and
   95 % intervals of the same weighted CDF, (1 − p)/2 < u < (1 + p)/2.

Why the weighted fraction: Talts et al. rank L independent draws, so the rank is uniform on {0 … L}.
An importance-weighted or autocorrelated sample has no L independent draws, but its weighted empirical
CDF estimates F with an error of order [u(1 − u)/ESS]^½ (ESS: Kish's for weights, the autocorrelation
one for MCMC), and F(θ̃ | d̃) is exactly uniform (the probability integral transform). Histogramming u
into B bins with 1/B ≫ ESS^(-½) (B = 10 and ESS ≥ 300 give a bin width 5× the largest error) moves a
mock at most into a neighbouring bin with a small, symmetric probability, which leaves a flat histogram
flat. The histogram counts are Binomial(N, 1/B) under calibration: its central 99 % band is drawn, and
Pearson's χ² against equal counts (`scipy.stats.chisquare`) gives a p-value; the coverage error is
binomial, [p(1 − p)/N]^½.
"""
from __future__ import annotations

import logging
import math
import os
import tempfile
import time
from dataclasses import dataclass, replace

import numpy as np
from scipy import special, stats

from infer.analysis.calibration import (LEVELS, Verdict, assess, binomial_band, default_bins,  # noqa: F401
                                        histogram, inside, weighted_rank)
from infer.errors import UserError
from infer.store.calibrationfile import FORMAT, FROZEN, SCALARS, Record  # noqa: F401

log = logging.getLogger("infer")

#: Mixed into every mock's seed sequence, so that the mocks never share a stream with a run's own seed.
SALT = 0xCA1B


# -- prior draws ---------------------------------------------------------------------------------------
def prior_draw(parameters, rng, size=None) -> np.ndarray:
    """A draw (P,) — or ``size`` draws (size, P) — of the sampled parameters from their independent priors:
    uniform; normal; normal truncated to [a, b] (`scipy.stats.truncnorm.ppf`, exact in the far tails)."""
    out = []
    for p in parameters:
        u = rng.random(size)
        kind, args = p.prior.kind, p.prior.args
        if kind == "uniform":
            out.append(args[0] + u * (args[1] - args[0]))
        elif kind == "normal":
            out.append(args[0] + args[1] * special.ndtri(u))
        else:
            mu, sd, a, b = args
            out.append(stats.truncnorm.ppf(u, (a - mu) / sd, (b - mu) / sd, loc=mu, scale=sd))
    return np.stack(out, axis=-1).astype(float)


def seeds(seed: int, index: int):
    """The three generators of mock ``index``: truth, noise, and the engine's seed (32-bit)."""
    truth, noise, engine = np.random.SeedSequence([int(seed), SALT, int(index)]).spawn(3)
    return np.random.default_rng(truth), np.random.default_rng(noise), int(engine.generate_state(1)[0])


# -- the set-up, checked before any engine run ----------------------------------------------------------
@dataclass(frozen=True)
class Setup:
    """Everything a worker needs (picklable): the run, the dataset layout, the spec's noise."""
    cfg: object                  # the run's Config
    layout_cfg: object           # the run's Config with the dataset selection removed (whole layout)
    template: object             # the run's dataset, whole layout (BandPowers), values replaced per mock
    noise_chol: np.ndarray       # Cholesky factor of the spec's covariance, dataset order
    fit_covariance: np.ndarray   # fit_cov_scale × the spec's covariance
    seed: int
    engine: str
    fit_cov_scale: float = 1.0

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.cfg.sampled)


def prepare(cfg, spec_path, fit_cov_scale: float = 1.0, seed: int | None = None, check=None) -> Setup:
    """Check the run ``cfg`` against the experiment spec and build the `Setup` (one theory call: the spec's
    fiducial spectra). Bad input is a one-line `UserError`, found before that call; ``check(request)`` is
    called then too (e.g. to compare with an existing record)."""
    from infer import data as datasets
    from infer.data.bandpowers import UNITS
    from infer.forecast.experiment import read_experiment
    from infer.forecast.knox import knox_covariance
    from infer.theory import theory_at_point
    if not (math.isfinite(fit_cov_scale) and fit_cov_scale > 0):
        raise UserError(f"--fit-cov-scale must be a positive number, got {fit_cov_scale}")
    if getattr(cfg.sections.get("likelihood"), "low_ell", "gaussian") != "gaussian":
        raise UserError(f"{cfg.path}: [likelihood] low_ell: the calibration draws Gaussian band powers, so it "
                        "calibrates the Gaussian likelihood only; remove the option")
    exp, fiducial, options = read_experiment(spec_path)
    if options["theory"].get("code") != cfg.theory["code"]:
        raise UserError(f"{spec_path}: [theory] code = {options['theory'].get('code')!r} but the run file {cfg.path} "
                        f"fits code = {cfg.theory['code']!r}; the spec's fiducial must be a point of the run's model")
    ds = cfg.dataset
    whole = {k: ds[k] for k in ("file", "covariance", "units") if k in ds}
    template = datasets.load(whole["file"], covariance=whole.get("covariance"), units=whole.get("units"))
    if UNITS[template.units][0]:
        raise UserError(f"{ds['file']}: the dataset is in {template.units} (C_ℓ-type); the spec's Knox covariance "
                        "is for D_ℓ band powers: calibrate with a D_ℓ-type dataset")
    if np.any(np.asarray(template.channel_1) != ""):
        raise UserError(f"{ds['file']}: a multi-frequency dataset; an experiment spec describes one channel, "
                        "so it cannot give this dataset's noise")
    lo, hi = exp.bin_edges()
    layout = [(k, int(a), int(b)) for k in exp.spectra for a, b in zip(lo, hi)]
    order = _match_bands(layout, template, spec_path, ds["file"])
    seed = int(cfg.seed if seed is None else seed)
    layout_cfg = replace(cfg, dataset=whole)
    if check is not None:
        check(request(Setup(cfg, layout_cfg, template, None, None, seed, cfg.sampling.engine, fit_cov_scale), spec_path))
    theory, inputs = theory_at_point(options["theory"], fiducial, exp.ell_max + 2, where=f"{spec_path}: [theory]",
                                     point_where=f"{spec_path}: [fiducial]")
    knox = knox_covariance(exp, theory.compute(inputs))
    if [(str(k), int(a), int(b)) for k, a, b in zip(knox.kind, knox.ell_lo, knox.ell_hi)] != layout:
        raise RuntimeError("the Knox covariance's band order differs from the experiment's bins")
    cov = np.asarray(knox.covariance, float)[np.ix_(order, order)]
    try:
        chol = np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        raise UserError(f"{spec_path}: the Knox covariance is not positive definite; no mock can be drawn") from None
    return Setup(cfg, layout_cfg, template, chol, fit_cov_scale * cov, seed, cfg.sampling.engine, fit_cov_scale)


def _match_bands(layout, data, spec_path, data_path) -> np.ndarray:
    """Index of each dataset band among the spec's bands; a band in one and not the other is refused."""
    spec = {band: i for i, band in enumerate(layout)}
    have = [(str(k), int(a), int(b)) for k, a, b in zip(data.kind, data.ell_lo, data.ell_hi)]
    missing = [band for band in have if band not in spec]
    extra = sorted(set(spec) - set(have), key=spec.get)
    if missing or extra:
        what = (f"the dataset's band {missing[0][0]} ℓ {missing[0][1]}–{missing[0][2]} is not among the spec's"
                if missing else f"the spec's band {extra[0][0]} ℓ {extra[0][1]}–{extra[0][2]} is not in the dataset")
        raise UserError(f"{spec_path}: the spec's bands ({len(spec)}) differ from those of the run file's dataset "
                        f"{data_path} ({len(have)}): {what}")
    return np.array([spec[band] for band in have])


# -- one mock, in a worker -----------------------------------------------------------------------------
@dataclass(frozen=True)
class MockFactory:
    """Picklable recipe for `infer.parallel` evaluators: each process builds one `MockRunner`."""
    setup: Setup

    def __call__(self) -> "MockRunner":
        return MockRunner(self.setup)


class MockRunner:
    """Evaluator protocol with the mock's index as the "point": ``(0, blob, None)`` with blob = truth (P),
    u (P), then `SCALARS`; a mock whose truth the theory cannot compute gets (−∞, NaN, reason)."""

    def __init__(self, setup: Setup):
        from infer.fit.bands import BandModel
        self.setup = setup
        self.forward = BandModel(setup.layout_cfg)
        P = len(setup.names)
        self.blob_names = tuple(f"truth_{n}" for n in setup.names) + tuple(f"rank_{n}" for n in setup.names) + SCALARS
        self._P = P

    def mock(self, index: int):
        """(truth, band powers, engine seed) of mock ``index``; band powers None if the theory failed."""
        s = self.setup
        r_truth, r_noise, engine_seed = seeds(s.seed, index)
        truth = prior_draw(s.cfg.sampled, r_truth)
        _, blob, reason = self.forward(truth)
        if reason is not None:
            return truth, None, engine_seed, reason
        mean = blob[:len(s.template)]
        return truth, mean + s.noise_chol @ r_noise.standard_normal(len(mean)), engine_seed, None

    def __call__(self, x):
        index = int(round(float(np.asarray(x).ravel()[0])))
        t0 = time.monotonic()
        blob = np.full(len(self.blob_names), np.nan)
        truth, values, engine_seed, reason = self.mock(index)
        if reason is not None:
            return -math.inf, blob, f"truth-not-computable ({reason})"
        from infer.parallel import Interrupted
        try:
            draws, weights, info = fit_mock(self.setup, values, engine_seed)
        except Interrupted:
            raise
        except Exception as err:  # noqa: BLE001 - one mock's failure is recorded, never the calibration's end
            return -math.inf, blob, f"engine-failed ({err.__class__.__name__}: {' '.join(str(err).split())[:200]})"
        P = self._P
        blob[:P] = truth
        blob[P:2 * P] = weighted_rank(draws, weights, truth)
        blob[2 * P:] = [info["ess"], info["exact_calls"], float(info["converged"]), time.monotonic() - t0, engine_seed]
        return 0.0, blob, None


def mock_config(setup: Setup, values, engine_seed: int, folder: str):
    """The run's Config on a mock dataset file written in ``folder`` (fit covariance, run's selection)."""
    from infer import data as datasets
    bp = replace(setup.template, value=np.asarray(values, float), covariance=setup.fit_covariance,
                 source="calibration mock")
    fd, path = tempfile.mkstemp(suffix=".h5", prefix=".calibration-mock-", dir=folder)
    os.close(fd)
    datasets.write(bp, path, overwrite=True, description="calibration mock (temporary)")
    dataset = {k: v for k, v in setup.cfg.dataset.items() if k not in ("covariance", "units")}
    dataset["file"] = path
    return replace(setup.cfg, dataset=dataset, seed=int(engine_seed)), path


def fit_mock(setup: Setup, values, engine_seed: int):
    """The run file's engine on one mock, in this process: (draws (n, P), weights (n,), info)."""
    quiet = log.level
    log.setLevel(max(quiet, logging.WARNING))                # the engine's own log lines, per mock, are noise
    path = None
    try:
        cfg, path = mock_config(setup, values, engine_seed, tempfile.gettempdir())
        if setup.engine == "surrogate":
            return _surrogate(cfg, path)
        return _ensemble(cfg, path)
    finally:
        log.setLevel(quiet)
        if path is not None and os.path.exists(path):
            os.unlink(path)


def _surrogate(cfg, path):
    from infer.parallel import InProcess
    from infer.sampling.engine import Engine
    from infer.sampling.exactlog import ExactLog, MemoryLog
    from infer.surrogate_run import chain_sampler_for, problem_for
    problem = problem_for(cfg)
    os.unlink(path)                                          # read once, when the model was built
    exact = ExactLog(InProcess(problem.model), MemoryLog(len(problem.names), len(problem.model.blob_names)),
                     batch=cfg.surrogate.batch)
    result = Engine(problem, exact, cfg.surrogate, cfg.stopping.ess_above, cfg.seed,
                    chain_sampler_for(cfg, problem)).run()
    return result.position, result.weights, {"ess": result.ess, "exact_calls": result.exact_calls,
                                             "converged": result.converged}


def _ensemble(cfg, path):
    from infer.analysis import burnin
    from infer.model.posterior import Posterior
    from infer.parallel import InProcess
    from infer.sampling.driver import Driver
    from infer.sampling.start import starting_ball
    from infer.store.memory import MemoryStore
    post = Posterior(cfg)
    os.unlink(path)
    ev = InProcess(post)
    store = MemoryStore("calibration")
    store.create(names=post.names, derived_names=post.derived_names, tex=post.labels(), bounds=post.priors.bounds,
                 start=starting_ball(cfg, ev, post.blob_names), provenance={})
    driver = Driver(cfg, store, ev, store.read(), interactive=False)
    outcome = driver.run(cfg.sampling.steps, None, None, None)
    if outcome.code != 0:                                    # paused by a signal: no posterior to rank
        from infer.parallel import Interrupted
        raise Interrupted
    samples = store.read().samples
    burn = burnin.choose(samples, tau_multiple=cfg.stopping.tau_multiple).burn
    draws = samples.after(burn).position.reshape(-1, len(post.names))
    v = outcome.verdict
    ess = min(v.ess_bulk_min, v.ess_tail_min) if v is not None else math.nan
    calls = samples.steps * cfg.sampling.ensembles * cfg.sampling.walkers
    return draws, np.full(len(draws), 1.0 / len(draws)), {"ess": float(ess), "exact_calls": int(calls),
                                                          "converged": outcome.reason == "converged"}




def request(setup: Setup, spec_path) -> dict:
    """What defines a calibration (stored, and compared when it is continued)."""
    import hashlib
    from pathlib import Path
    return {"run_file": setup.cfg.path, "run_file_sha256": hashlib.sha256(setup.cfg.text.encode()).hexdigest(),
            "dataset_sha256": setup.template.sha256, "spec": str(Path(spec_path).resolve()),
            "spec_sha256": hashlib.sha256(Path(spec_path).read_bytes()).hexdigest(), "seed": setup.seed,
            "fit_cov_scale": float(setup.fit_cov_scale),
            "engine": setup.engine, "names": list(setup.names)}


def run(setup: Setup, record: Record, path, mocks: int, workers: int = 0, threads: int = 0, should_stop=None,
        progress=None, write_seconds: float = 5.0) -> Record:
    """Run the mocks of ``range(mocks)`` not yet in ``record``, ``max(workers, 1)`` at a time (one mock per
    worker process, its engine in-process there; ``workers`` = 0: here). The record is written at most every
    ``write_seconds`` and whenever the loop ends, also by an interruption (a kill loses at most that much
    work). ``progress(done, total)`` after each batch. Raises `infer.parallel.Interrupted` when
    ``should_stop()`` turns true (the record then holds every finished mock)."""
    from infer.parallel import make_evaluator, never
    todo = [i for i in range(mocks) if i not in record.done]
    if not todo:
        return record
    P = len(setup.names)
    ev = make_evaluator(MockFactory(setup), workers, threads, should_stop=should_stop or never)
    last, dirty = time.monotonic(), False
    try:
        step = max(1, workers)
        for a in range(0, len(todo), step):
            chunk = todo[a:a + step]
            lp, blobs, reasons = ev.evaluate(np.array(chunk, float)[:, None])
            for i, l, b, r in zip(chunk, lp, blobs, reasons):
                record.add(i, l, b, r, P)
                if r is not None:
                    log.warning("mock %d failed and is left out (%s)", i, r)
            dirty = True
            if time.monotonic() - last >= write_seconds:
                record.write(path)
                last, dirty = time.monotonic(), False
            if progress is not None:
                progress(len([i for i in record.done if i < mocks]), mocks)
    finally:
        ev.close()
        if dirty:
            record.write(path)
    return record

__all__ = ["Setup", "prepare", "MockFactory", "MockRunner", "prior_draw", "seeds", "weighted_rank", "inside",
           "histogram", "binomial_band", "assess", "Verdict", "default_bins", "LEVELS", "SCALARS", "Record", "request", "run",
           "FORMAT"]
