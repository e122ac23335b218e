"""The best fit of a run: the maximum of the posterior (MAP) or of the likelihood (MLE), its curvature
and the quality of the fit.

A Gaussian band-power likelihood is least squares after whitening by the Cholesky factor L of the
covariance, r = L⁻¹(d − m(θ)) (−2 ln L = rᵀr + ln det 2πC); a Gaussian prior N(μ, σ²) on a parameter adds
the residual (θ − μ)/σ; uniform and truncated priors are bounds. So the MAP is a bounded non-linear least
squares problem, solved by the damped optimiser of `infer.fit.lm`; the MLE drops the Gaussian prior
residuals but keeps every prior's support as bounds (a model outside it is not computed).

Parameters are optimised in units of their starting spread (``[parameters.NAME] spread``, by default a
fraction of the prior width), which also sets the finite-difference steps. The starts are the guesses
plus draws from the starting ball N(guess, spread²), seeded by ``[run] seed``, so a fit is reproducible.

Reported: the optimum θ̂ (and which parameters end on a prior bound), −2 ln L, χ² in total and per spectrum
with degrees of freedom and probability to exceed (scipy.stats.chi2.sf), the Gauss–Newton curvature and the
Laplace covariance (`infer.fit.curvature`, an approximation and labelled as such), the derived values at
θ̂, and every exact call spent. Degrees of freedom: N bands − P fitted parameters for the total (the usual
count, exact for a linear model with flat priors; informative priors and bounds make it approximate),
and the number of bands for each spectrum on its own.
"""
from __future__ import annotations

import json
import logging
import math
import os
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from infer.config import support
from infer.errors import UserError
from infer.fit import lm
from infer.fit.bands import BandModelFactory
from infer.fit.curvature import laplace

log = logging.getLogger("infer")

FORMAT = "infer-fit"
FORMAT_VERSION = 1
MODES = ("posterior", "likelihood")
#: Suffix of the default output file, after the chain path without its ``.h5``.
SUFFIX = {"posterior": ".peak-posterior.json", "likelihood": ".peak-likelihood.json"}


@dataclass
class FitResult:
    mode: str                                # "posterior" (MAP) or "likelihood" (MLE)
    names: list
    best: dict                               # name → θ̂
    sigma: dict                              # name → Laplace σ
    covariance: list                         # (P, P) Laplace covariance F⁻¹
    correlation: list
    curvature: list                          # (P, P) F = JᵀJ + prior terms
    at_bound: dict                           # name → "lower" | "upper" for parameters ending on a bound
    derived: dict                            # derived values at θ̂
    neg2_log_like: float
    log_post: float | None                   # ln p at θ̂ (MAP mode) — prior density included
    chi2: float                              # data χ² at θ̂
    chi2_prior: float                        # Σ ((θ − μ)/σ)² over Gaussian priors (0 in likelihood mode)
    n_bands: int
    dof: int
    pte: float
    per_spectrum: dict                       # kind → {chi2, n_bands, pte}
    calls: int                               # every exact (theory) call of the fit
    iterations: int
    converged: bool
    reason: str
    starts: list
    condition: float
    laplace_note: str
    run: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"format": FORMAT, "format_version": FORMAT_VERSION, **_plain(asdict(self))}


def _plain(x):
    """JSON-safe: numpy to Python, NaN/inf to None."""
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, np.ndarray):
        return _plain(x.tolist())
    if isinstance(x, (np.floating, float)):
        return float(x) if math.isfinite(x) else None
    if isinstance(x, (np.integer,)):
        return int(x)
    if isinstance(x, np.bool_):
        return bool(x)
    return x


class Objective:
    """Residual rows [L⁻¹(d − m(θ)), (θ_g − μ_g)/σ_g] of points given in scale units u = (θ − centre)/scale,
    from an evaluator whose blob starts with the binned theory (`BandModel.residuals` whitens it; with
    analytic parameters the first block is the marginal one, of length N + K); keeps every evaluated point."""

    def __init__(self, evaluator, model, centre, scale, mu, sd, posterior: bool = True):
        self.evaluator, self.model = evaluator, model
        self.centre, self.scale = np.asarray(centre, float), np.asarray(scale, float)
        self.gauss = np.isfinite(sd)
        self.mu, self.sd = np.asarray(mu, float), np.asarray(sd, float)
        self.n = model.n_residuals
        # Gaussian priors on derived quantities (``[derived.NAME]``) are residual rows too (posterior mode).
        self.dprior = _derived_rows(model, posterior)
        self.records: list[tuple[np.ndarray, float, np.ndarray, str | None]] = []

    def theta(self, u):
        return self.centre + self.scale * np.asarray(u, float)

    def __call__(self, U):
        T = self.theta(np.atleast_2d(U))
        lp, blobs, reasons = self.evaluator.evaluate(T)
        ng = int(self.gauss.sum())
        R = np.full((len(T), self.n + ng + len(self.dprior)), np.nan)
        for i, (t, b, why) in enumerate(zip(T, blobs, reasons)):
            self.records.append((t.copy(), float(lp[i]), np.array(b), why))
            if why is None and np.all(np.isfinite(b[:self.model.n_bands])):
                R[i, :self.n] = self.model.residuals(t, b)
                R[i, self.n:self.n + ng] = (t[self.gauss] - self.mu[self.gauss]) / self.sd[self.gauss]
                for j, (k, m, s) in enumerate(self.dprior):
                    R[i, self.n + ng + j] = (b[self.model.n_bands + k] - m) / s
        return R

    def record_at(self, theta):
        for t, lp, b, why in reversed(self.records):
            if np.array_equal(t, theta):
                return lp, b, why
        raise KeyError("point not evaluated")


def _derived_rows(model, posterior: bool):
    """(index in the derived blob, mean, sd) of each Gaussian ``[derived.NAME]`` prior (posterior mode);
    uniform derived priors act as bounds through ln p = −∞ (points outside count as failed)."""
    post = model.posterior
    if not posterior or post.derived_priors is None:
        return []
    rows = []
    for name, k in zip(post.derived_priors.names, post._derived_prior_index):
        prior = post.cfg.sections["derived"][name]
        if prior.kind != "uniform":
            rows.append((model.derived_names.index(post._derived[k]), prior.args[0], prior.args[1]))
    return rows


def starting_points(cfg, n: int, seed_offset: int = 0) -> np.ndarray:
    """The guesses, then n − 1 draws from N(guess, spread²) kept inside the prior support."""
    sampled = cfg.sampled
    guess = np.array([p.guess for p in sampled])
    spread = np.array([p.spread for p in sampled])
    lo, hi = np.array([support(p.prior) for p in sampled]).T
    rng = np.random.default_rng([int(cfg.seed), 0x6F17, seed_offset])
    out = [guess]
    while len(out) < n:
        x = guess + spread * rng.standard_normal(len(guess))
        if np.all((x > lo) & (x < hi)):
            out.append(x)
    return np.array(out)


def fit(cfg, *, starts: int = 3, mode: str = "posterior", evaluator=None, workers: int | None = None,
        options: lm.Options | None = None, model=None) -> FitResult:
    """Best fit of the run ``cfg``: MAP (``mode="posterior"``) or MLE (``"likelihood"``).

    ``evaluator``: anything with ``evaluate(points)`` whose blob begins with the model band powers (built
    from `BandModelFactory`); by default one is made here, in this process (``workers`` = 0) or in a pool of
    ``workers`` processes (default: ``[sampling] workers``). Every exact call is counted in ``calls``.
    """
    if mode not in MODES:
        raise UserError(f"fit mode must be one of {', '.join(MODES)}, got {mode!r}")
    if not (isinstance(starts, int) and not isinstance(starts, bool) and starts >= 1):
        raise UserError(f"the number of starts must be an integer >= 1, got {starts!r}")
    t0 = time.monotonic()
    factory = BandModelFactory(cfg)
    model = model if model is not None else factory()
    own = evaluator is None
    if own:
        from infer.parallel import make_evaluator
        workers = cfg.sampling.workers if workers is None else workers
        evaluator = make_evaluator(factory, workers, cfg.sampling.threads_per_worker, built=model)
    try:
        return _fit(cfg, model, evaluator, starts, mode, options or lm.Options(), t0)
    finally:
        if own:
            evaluator.close()


def _fit(cfg, model, evaluator, starts, mode, options, t0) -> FitResult:
    sampled = cfg.sampled
    names = [p.name for p in sampled]
    P = len(names)
    guess = np.array([p.guess for p in sampled])
    scale = np.array([p.spread for p in sampled])
    lo, hi = np.array([support(p.prior) for p in sampled], float).T
    mu = np.array([p.prior.args[0] if p.prior.kind != "uniform" else 0.0 for p in sampled])
    sd = np.array([p.prior.args[1] if p.prior.kind != "uniform" and mode == "posterior" else np.inf
                   for p in sampled])
    obj = Objective(evaluator, model, guess, scale, mu, sd, posterior=mode == "posterior")
    U0 = (starting_points(cfg, starts) - guess) / scale
    log.info("fit: %s of '%s', %d parameters, %d start%s", "MAP" if mode == "posterior" else "MLE",
             cfg.name, P, starts, "" if starts == 1 else "s")
    try:
        res = lm.minimize(obj, U0, (lo - guess) / scale, (hi - guess) / scale, options)
    except lm.FitFailed as err:
        raise UserError(f"{cfg.path}: cannot fit: {err} (see `infer check {cfg.path}`)") from None
    calls = res.calls
    jac = res.jac
    if not res.jac_fresh:                   # the reported curvature is always a finite-difference one
        lo_u, hi_u = (lo - guess) / scale + lm._INSIDE, (hi - guess) / scale - lm._INSIDE
        pts, side = lm.stencil(res.u, np.full(P, options.fd_step), lo_u, hi_u)
        jac = lm.jacobian_from(res.u, res.r, pts, side, obj(pts))
        calls += len(pts)
    theta = obj.theta(res.u)
    lp, blob, _ = obj.record_at(theta)
    n, nr = model.like.n, model.n_residuals
    bands = model.model_bands(theta, blob)
    chi2 = float(np.sum(res.r[:nr] ** 2))
    chi2_prior = float(np.sum(res.r[nr:] ** 2))
    lap = laplace(jac[:nr] / scale, sd)
    dof = n - P
    quality = model.like.fit_quality(bands, P)
    per = {k: {"chi2": c, "n_bands": m, "pte": model.like.pte(c, m)} for k, (c, m) in quality.by_kind.items()}
    at_bound = {nm: "lower" for nm, a in zip(names, res.at_lower) if a}
    at_bound.update({nm: "upper" for nm, a in zip(names, res.at_upper) if a})
    note = ("Laplace approximation: Gauss–Newton curvature JᵀJ (plus Gaussian prior terms) from central "
            "finite differences at the optimum; exact for a linear model, approximate otherwise")
    if at_bound:
        note += (f"; {', '.join(at_bound)} on a prior bound: the posterior is cut there and a Gaussian "
                 "with these σ's is a poor description of it")
    if lap["singular"]:
        note += "; the curvature is singular (an unconstrained direction): pseudo-inverse used"
    out = FitResult(
        mode=mode, names=names, best=dict(zip(names, theta.tolist())), sigma=dict(zip(names, lap["sigma"].tolist())),
        covariance=lap["covariance"].tolist(), correlation=lap["correlation"].tolist(),
        curvature=lap["curvature"].tolist(), at_bound=at_bound,
        derived=dict(zip(model.derived_names, blob[model.n_bands:].tolist())),
        neg2_log_like=-2.0 * model.like.loglike_bands(np.asarray(blob[:model.n_bands], float),
                                                      model.nuisance(theta))[0],
        log_post=lp if mode == "posterior" else None,
        chi2=chi2, chi2_prior=chi2_prior, n_bands=n, dof=dof, pte=model.like.pte(chi2, dof), per_spectrum=per,
        calls=calls, iterations=res.iterations, converged=res.converged, reason=res.reason,
        starts=[dict(s, start=dict(zip(names, obj.theta(s["start"]).tolist())),
                     end=dict(zip(names, obj.theta(s["end"]).tolist()))) for s in res.starts],
        condition=lap["condition"], laplace_note=note,
        run={"name": cfg.name, "config": cfg.path, "dataset": cfg.dataset["file"],
             "fd_step_in_spreads": options.fd_step, "seconds": round(time.monotonic() - t0, 3)})
    log.info("fit: %s after %d exact calls (%s)", "converged" if res.converged else "NOT converged", calls,
             res.reason)
    return out


# -- files and tables --------------------------------------------------------------------------------------
def default_path(cfg, mode: str) -> Path:
    """``<chain path without .h5>`` + our suffix (see `SUFFIX`)."""
    return Path(cfg.chain_path[:-3] + SUFFIX[mode])


def check_output(path, replace: bool) -> Path:
    """Before any theory call: the output ends in .json, its folder is writable, and an existing file is
    replaced only with ``replace`` and only when it is an earlier fit result (never a chain or dataset)."""
    p = Path(path).expanduser().resolve()
    if p.suffix != ".json":
        raise UserError(f"{path}: the fit result is written as JSON; the file name must end in .json")
    if p.is_dir():
        raise UserError(f"{path}: is a folder, not a file name")
    try:
        p.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise UserError(f"{p.parent}: cannot create the output folder ({err.strerror})") from None
    if not os.access(p.parent, os.W_OK | os.X_OK):
        raise UserError(f"{p.parent}: the output folder is not writable")
    if os.path.lexists(p):
        if not replace:
            raise UserError(f"{p} already exists (pass --replace to overwrite an earlier fit result)")
        try:
            ok = json.loads(p.read_text(encoding="utf-8")).get("format") == FORMAT
        except (OSError, UnicodeDecodeError, ValueError, AttributeError):
            ok = False
        if not ok:
            raise UserError(f"{p} exists and is not a fit result written by infer; refusing to overwrite it")
    return p


def write(result: FitResult, path, overwrite: bool = True) -> Path:
    """The result as JSON, written atomically (``overwrite=False``: never over a file that appeared since
    `check_output`)."""
    from infer.atomic import write_text_atomic
    return write_text_atomic(path, json.dumps(result.to_dict(), indent=1, allow_nan=False) + "\n",
                             overwrite=overwrite)


def table(result: FitResult) -> str:
    """A short text table: parameters with best fit and Laplace σ, then χ² per spectrum."""
    lines = [f"{'parameter':<16}{'best fit':>14}{'Laplace σ':>12}  note"]
    for nm in result.names:
        note = f"on {result.at_bound[nm]} bound" if nm in result.at_bound else ""
        lines.append(f"{nm:<16}{result.best[nm]:>14.6g}{result.sigma[nm]:>12.3g}  {note}".rstrip())
    for nm, v in result.derived.items():
        lines.append(f"{nm:<16}{v:>14.6g}{'':>12}  derived")
    lines.append("")
    lines.append(f"{'spectrum':<16}{'χ²':>10}{'dof':>8}{'PTE':>8}   (each spectrum: dof = its bands)")
    for k, d in result.per_spectrum.items():
        lines.append(f"{k:<16}{d['chi2']:>10.1f}{d['n_bands']:>8d}{d['pte']:>8.3f}")
    lines.append(f"{'all (joint)':<16}{result.chi2:>10.1f}{result.dof:>8d}{result.pte:>8.3f}   "
                 f"dof = {result.n_bands} bands − {len(result.names)} parameters")
    lines.append(f"−2 ln L = {result.neg2_log_like:.2f}" + (f", prior χ² = {result.chi2_prior:.2f}"
                                                             if result.mode == "posterior" else ""))
    lines.append(f"{'converged' if result.converged else 'NOT converged'}: {result.reason}; "
                 f"{result.calls} exact calls, {result.iterations} iterations")
    return "\n".join(lines)
