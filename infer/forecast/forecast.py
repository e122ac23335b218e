"""The Fisher forecast of a run file for an invented experiment: the errors its posterior would have if
it were the Gaussian approximation at the fiducial point.

Method. The experiment spec (`infer.forecast.experiment`) gives the bands and, at its ``[fiducial]``
point, noise-free band powers with the Gaussian (Knox 1995, Phys. Rev. D 52, 4307) covariance C
(`infer.forecast.mock.simulate` without a draw, then the run file's ``[dataset]`` cuts). The run file gives
the model m(θ) (its ``[theory]``, nuisance terms and ``[likelihood]``, exactly as a fit of that dataset
would compute it: `infer.model.posterior.Posterior` on the fiducial bands) and the parameters. Then

    F_ij = ∂_i mᵀ C⁻¹ ∂_j m   (Tegmark, Taylor & Heavens 1997, ApJ 480, 22),

by central differences with the step check of `infer.forecast.fisher.numerical_fisher` (first steps: the
run file's ``spread``), plus 1/σ² on the diagonal for each normal prior (a truncation range is ignored);
uniform priors add nothing and fixed parameters stay at their run-file values. Reported per parameter:
the marginalised σ_i = √[(F + P)⁻¹]_ii, the conditional σ_i = 1/√(F + P)_ii (all others fixed) and the
correlation matrix.

What it is: the covariance of the Gaussian (Laplace) approximation of the posterior at the fiducial
point, expected over noise realisations — exact for a model linear in θ with Gaussian priors and a
parameter-independent covariance, an approximation otherwise (labelled so everywhere it is printed). It
ignores uniform prior bounds, skewness and curved degeneracies; the sampled posterior of a mock
(``--against CHAIN``) is what tells how good the approximation is.

The fiducial point in the run's parameters: each sampled or fixed parameter is read from the spec's
``[fiducial]``, else it is a nuisance parameter at its neutral value (`infer.model.nuisance.NUISANCE`),
else a derived quantity of the spec's theory at the fiducial (θ_* when the spec gives H₀), else an
optional input at the spec theory's own default; anything else is refused before any theory call.
The exact calls run through any evaluator of `infer.parallel`.
"""
from __future__ import annotations

import importlib
import logging
import math
import sys
import time
from dataclasses import dataclass, field

import numpy as np

from infer.errors import UserError
from infer.forecast.experiment import read_experiment
from infer.forecast.fisher import NumericalFisher, numerical_fisher
from infer.forecast.mock import simulate
from infer.model.nuisance import NUISANCE
from infer.theory import TheoryError, theory_at_point, theory_class

log = logging.getLogger("infer")

FORMAT = "infer-forecast"
FORMAT_VERSION = 1
LABEL = ("Fisher forecast: the Gaussian approximation of the posterior at the fiducial point "
         "(not a sampled posterior)")


# -- the model at one point, for any evaluator -------------------------------------------------------------
class FiducialBands:
    """ln L of the fiducial bands and the model band powers at a point (blob = m_1 … m_N), for the
    evaluators of `infer.parallel`; a point the theory cannot compute gets −∞, a NaN blob and its reason."""

    def __init__(self, cfg, data):
        from infer.model.posterior import Posterior
        self.posterior = Posterior(cfg, data=data)
        self.n_bands = self.posterior.like.n
        self.blob_names = tuple(f"band_{i}" for i in range(self.n_bands))

    def __call__(self, x):
        blob = np.full(self.n_bands, np.nan)
        try:
            model = self.posterior.model_bands(np.asarray(x, float))
        except TheoryError as err:
            return -math.inf, blob, err.reason
        if not np.all(np.isfinite(model)):
            return -math.inf, blob, "non-finite-model"
        like = self.posterior.like
        return -0.5 * like.chi2(model) - like.lognorm, model, None


@dataclass(frozen=True)
class FiducialBandsFactory:
    """Picklable recipe of `FiducialBands` (the validated run settings and the fiducial bands)."""

    cfg: object
    data: object

    def __call__(self) -> FiducialBands:
        return FiducialBands(self.cfg, self.data)


# -- set-up: everything checked before the first theory call -------------------------------------------
@dataclass
class Setup:
    spec: str
    exp: object
    fiducial: dict
    theory: dict                     # the spec's [theory] table
    cfg: object
    sources: dict                    # run parameter → where its fiducial value comes from
    skeleton: object                 # the cut bands with a placeholder covariance (for the checks)


def _where_from(name: str, fiducial: dict, spec_cls, spec_theory: dict) -> str | None:
    if name in fiducial:
        return "fiducial"
    if name in NUISANCE:
        return "nuisance"
    if name in spec_cls.derived_names:
        return "derived"
    defaults = getattr(importlib.import_module(spec_cls.__module__), "OPTIONAL_DEFAULTS", {})
    if name in defaults or name in getattr(spec_cls, "point_settings", ()):
        return "default"
    return None


def prepare(spec, cfg) -> Setup:
    """Read the spec and check it against the run ``cfg`` (a loaded `infer.config.Config`): the run's
    [dataset] cuts apply to the spec's bands, and every run parameter has a fiducial value. No theory
    call; every problem is a one-line `UserError`."""
    from infer import data as datasets
    from infer.data import selection
    exp, fiducial, options = read_experiment(spec)
    theory = options["theory"]
    spec_cls = theory_class(theory.get("code"), f"{spec}: [theory]")
    lo, hi = exp.bin_edges()
    n = exp.n_bins * len(exp.spectra)
    skeleton = datasets.from_arrays(kind=np.repeat(np.array(exp.spectra), exp.n_bins), ell_lo=np.tile(lo, len(exp.spectra)),
                                    ell_hi=np.tile(hi, len(exp.spectra)), value=np.zeros(n), covariance=np.eye(n),
                                    units="Dl_uK2", experiment=exp.name, source=str(spec))
    try:
        skeleton = selection.cut(skeleton, cfg.dataset)
    except UserError as err:
        raise UserError(f"{cfg.path}: [dataset] cuts do not fit the bands of {spec} ({err})") from None
    sources = {}
    for p in cfg.parameters:
        where = _where_from(p.name, fiducial, spec_cls, theory)
        if where is None:
            raise UserError(f"{cfg.path}: [parameters.{p.name}] has no fiducial value in {spec}: not in "
                            f"[fiducial], not a nuisance parameter, not a derived quantity of theory code "
                            f"'{spec_cls.code}'")
        sources[p.name] = where
    setup = Setup(str(spec), exp, fiducial, theory, cfg, sources, skeleton)
    known = {p.name: v for p, v in zip(cfg.sampled, (_static_value(setup, p.name, spec_cls) for p in cfg.sampled))
             if v is not None}
    check_support(setup, known)
    return setup


def _static_value(setup: Setup, name: str, spec_cls):
    """A fiducial value known without a theory call (None for a derived quantity)."""
    src = setup.sources[name]
    if src == "fiducial":
        return setup.fiducial[name]
    if src == "nuisance":
        return NUISANCE[name]
    if src == "default":
        defaults = getattr(importlib.import_module(spec_cls.__module__), "OPTIONAL_DEFAULTS", {})
        return defaults[name] if name in defaults else setup.theory.get(name, spec_cls.SETTINGS[name].default)
    return None


def check_support(setup: Setup, values: dict) -> None:
    """Every fiducial value of a sampled parameter lies inside its prior's support."""
    from infer.config import support
    for p in setup.cfg.sampled:
        if p.name not in values:
            continue
        lo, hi = support(p.prior)
        if not lo < values[p.name] < hi:
            raise UserError(f"{setup.cfg.path}: the fiducial {p.name} = {values[p.name]:.6g} ({setup.sources[p.name]}, "
                            f"{setup.spec}) lies outside the prior support [{lo:g}, {hi:g}] of [parameters.{p.name}]")


def fiducial_data(setup: Setup):
    """The noise-free fiducial bands with the Knox covariance, cut as the run asks, and the fiducial
    spectra (one call of the spec's theory)."""
    from infer.data import selection
    exp = setup.exp
    theory, inputs = theory_at_point(setup.theory, setup.fiducial, exp.ell_max + 2,
                                     where=f"{setup.spec}: [theory]", point_where=f"{setup.spec}: [fiducial]")
    try:
        spectra = theory.compute(inputs)
    except TheoryError as err:
        raise UserError(f"{setup.spec}: the theory cannot compute the [fiducial] point ({err.reason})") from None
    bands = simulate(exp, spectra, realise=False)
    return selection.cut(bands, setup.cfg.dataset), spectra, theory


def fiducial_point(setup: Setup, spectra, spec_theory) -> tuple[dict, list[str]]:
    """Every run parameter's fiducial value, and notes (fixed values that differ from it)."""
    values, notes = {}, []
    for p in setup.cfg.parameters:
        v = _static_value(setup, p.name, type(spec_theory))
        v = float(spectra.derived[p.name] if v is None else v)
        values[p.name] = v
        if p.value is not None and not math.isclose(p.value, v, rel_tol=1e-6, abs_tol=1e-12):
            notes.append(f"{p.name} is fixed at {p.value:g} in the run file; the spec's fiducial is {v:.6g}")
    return values, notes


# -- the exact calls -----------------------------------------------------------------------------------
class StencilCalls:
    """``model(points (M, P)) → (M, N)`` through an evaluator, in chunks of ``chunk`` points, with a live
    bar on a terminal and a log line per round of the step check otherwise."""

    def __init__(self, evaluator, n_bands: int, names, chunk: int, interactive: bool | None = None):
        self.ev, self.n, self.names, self.chunk = evaluator, n_bands, names, max(1, chunk)
        self.calls, self.round, self.t0 = 0, 0, time.monotonic()
        self.interactive = sys.stderr.isatty() if interactive is None else interactive
        self.bar = None

    def __call__(self, points):
        points = np.atleast_2d(np.asarray(points, float))
        self.round += 1
        if self.interactive and self.bar is None:
            from tqdm import tqdm
            self.bar = tqdm(total=len(points), unit="call", file=sys.stderr, dynamic_ncols=True,
                            desc="Fisher stencil")
        elif self.bar is not None:
            self.bar.total += len(points)
        out = np.empty((len(points), self.n))
        for a in range(0, len(points), self.chunk):
            _, blobs, reasons = self.ev.evaluate(points[a:a + self.chunk])
            for k, why in enumerate(reasons):
                if why is not None:
                    x = ", ".join(f"{n} = {v:.6g}" for n, v in zip(self.names, points[a + k]))
                    raise UserError(f"the theory failed at a point of the Fisher stencil ({why}) at {x}; "
                                    "smaller first steps ([parameters.NAME] spread) keep it nearer the fiducial")
            out[a:a + len(reasons)] = blobs[:, :self.n]
            self.calls += len(reasons)
            if self.bar is not None:
                self.bar.update(len(reasons))
        if self.bar is None:
            what = ("the fiducial point" if self.round == 1 else "the first stencil" if self.round == 2 else
                    f"step halving {self.round - 2}")
            log.info("forecast: %s: %d exact call%s (%d in all, %.0f s)", what, len(points),
                     "" if len(points) == 1 else "s", self.calls, time.monotonic() - self.t0)
        return out

    def close(self):
        if self.bar is not None:
            self.bar.close()


# -- the result ------------------------------------------------------------------------------------------
@dataclass
class Forecast:
    """A Fisher forecast (see the module docstring): Gaussian approximation, labelled as such."""

    names: tuple
    tex: dict
    x0: np.ndarray                   # fiducial point of the sampled parameters
    fisher: NumericalFisher          # the data's Fisher matrix and its step-check diagnostics
    prior_precision: np.ndarray      # (P,) 1/σ² of normal priors, 0 for uniform
    fixed: dict                      # fixed parameters and their values
    experiment: str
    spec: str
    run: str
    n_bands: int
    chi2_fiducial: float             # χ² of the run's model at x0 against the fiducial bands (≈ 0)
    calls: int
    seconds: float
    notes: list = field(default_factory=list)

    @property
    def matrix(self) -> np.ndarray:
        """F + prior precision."""
        return self.fisher.matrix + np.diag(self.prior_precision)

    @property
    def covariance(self) -> np.ndarray:
        return np.linalg.inv(self.matrix)

    @property
    def sigma(self) -> np.ndarray:
        """Marginalised σ."""
        return np.sqrt(np.diag(self.covariance))

    @property
    def conditional(self) -> np.ndarray:
        """Conditional σ (every other parameter fixed at the fiducial)."""
        return 1.0 / np.sqrt(np.diag(self.matrix))

    @property
    def correlation(self) -> np.ndarray:
        s = self.sigma
        return self.covariance / np.outer(s, s)

    def to_dict(self) -> dict:
        f = self.fisher
        return {"format": FORMAT, "format_version": FORMAT_VERSION, "what": LABEL, "spec": self.spec,
                "run": self.run, "experiment": self.experiment, "n_bands": self.n_bands, "names": list(self.names),
                "fiducial": dict(zip(self.names, self.x0.tolist())), "fixed": dict(self.fixed),
                "sigma": dict(zip(self.names, self.sigma.tolist())),
                "conditional_sigma": dict(zip(self.names, self.conditional.tolist())),
                "covariance": self.covariance.tolist(), "correlation": self.correlation.tolist(),
                "fisher_data": f.matrix.tolist(), "prior_precision": self.prior_precision.tolist(),
                "steps": f.steps.tolist(), "step_change": [float(c) for c in f.change],
                "converged": f.converged.tolist(), "rtol": f.rtol, "chi2_fiducial": self.chi2_fiducial,
                "exact_calls": self.calls, "seconds": self.seconds, "notes": list(self.notes)}


def prior_precision(cfg) -> np.ndarray:
    """1/σ² of each sampled parameter's normal prior (truncated or not), 0 for a uniform prior."""
    return np.array([0.0 if p.prior.kind == "uniform" else 1.0 / p.prior.args[1] ** 2 for p in cfg.sampled])


def forecast(setup: Setup, *, workers: int = 0, evaluator=None, rtol: float = 1e-2, max_halvings: int = 6,
             interactive: bool | None = None) -> Forecast:
    """The Fisher forecast of ``setup`` (from `prepare`). Exact calls go through ``evaluator`` if given,
    else one made here for ``workers`` processes (0: this process)."""
    from infer.config import support
    t0 = time.monotonic()
    cfg = setup.cfg
    data, spectra, spec_theory = fiducial_data(setup)
    values, notes = fiducial_point(setup, spectra, spec_theory)
    names = tuple(p.name for p in cfg.sampled)
    x0 = np.array([values[n] for n in names])
    check_support(setup, values)
    fixed = {k: float(v) for k, v in cfg.fixed.items()}
    factory = FiducialBandsFactory(cfg, data)
    own = evaluator is None
    if own:
        from infer.parallel import make_evaluator
        evaluator = make_evaluator(factory, workers, cfg.sampling.threads_per_worker)
    calls = StencilCalls(evaluator, len(data.value), names, max(1, workers), interactive)
    try:
        chi2 = _chi2(data, calls(x0[None, :])[0])         # the run's model at x0 against the fiducial bands
        steps = np.array([p.spread for p in cfg.sampled], float)
        result = numerical_fisher(calls, x0, steps, data.covariance, names=names, rtol=rtol,
                                  max_halvings=max_halvings, vectorized=True)
    finally:
        calls.close()
        if own:
            evaluator.close()
    low = cfg.sections.get("likelihood")
    if low is not None and getattr(low, "low_ell", None) == "hamimeche-lewis":
        notes.append("the run's low-ℓ bands use the Hamimeche–Lewis likelihood; the forecast treats every band "
                     "with the Gaussian (Knox) covariance")
    if not result.all_converged:
        bad = [n for n, ok in zip(names, result.converged) if not ok]
        notes.append(f"the step check did NOT converge for {', '.join(bad)} (rtol {rtol:g}); their "
                     "errors are uncertain (see the step table)")
    tex = {p.name: p.tex for p in cfg.sampled}
    out = Forecast(names, tex, x0, result, prior_precision(cfg), fixed, setup.exp.name, setup.spec, str(cfg.path),
                   len(data.value), float(chi2), calls.calls, time.monotonic() - t0, notes)
    for p, v, s in zip(cfg.sampled, x0, out.sigma):
        lo, hi = support(p.prior)
        if p.prior.kind == "uniform" and (v - 2 * s < lo or v + 2 * s > hi):
            out.notes.append(f"{p.name}: the uniform prior's bound lies within 2σ of the fiducial; the Gaussian "
                             "approximation ignores it")
    return out


def _chi2(data, model) -> float:
    from scipy import linalg
    r = linalg.solve_triangular(np.linalg.cholesky(data.covariance), data.value - model, lower=True)
    return float(r @ r)
