"""The profile likelihood of one parameter: −2 ln L minimised over all the others on a grid of its values.

For a parameter ψ and the others φ, the profile is −2 ln L_p(ψ) = min_φ −2 ln L(ψ, φ), the φ ranging over
the prior support (priors are bounds only; ``mode="posterior"`` keeps the Gaussian prior terms as
penalties, the profile of −2 ln p). Each grid point is a bounded least-squares fit of the whitened
band-power residuals with ψ held fixed, by the damped optimiser of `infer.fit.lm` (the fit of
`infer.fit.bestfit` with one parameter removed from the optimised set), warm-started from its neighbour's
optimum extrapolated linearly along the profile path; the grid is walked outwards from the global best
fit, so every start is within one grid step of an optimum. The Jacobian's 2(P − 1) points of each
iteration are evaluated in one call of the evaluator (in parallel in a worker pool or on MPI ranks).

Intervals: Δχ²(ψ) = −2 ln L_p(ψ) − min(−2 ln L), the minimum taken over the global fit and the grid.
By Wilks' theorem (Wilks 1938, Ann. Math. Stat. 9, 60) Δχ² is asymptotically χ² with one degree of
freedom, so {Δχ² ≤ 1} and {Δχ² ≤ 3.84} are approximate 68.3 % and 95 % confidence intervals (common
practice; exact for a Gaussian likelihood linear in the parameters, where the profile is a parabola of
curvature 1/σ² and the Δχ² = 1 interval is ±1σ). Crossings are interpolated linearly in the *signed root*
s(ψ) = ±√Δχ² (negative left of the minimum), which is linear in ψ for a parabola, so the interpolation is
exact in the Gaussian case and second-order accurate near it. An interval whose crossing is not inside the
grid is reported as reaching the grid edge, or the prior bound when the grid ends there: it is then a
one-sided limit or needs a wider grid, and says so. The minimum and curvature are those of the parabola
through the three grid points around the lowest one.

"The surrogate proposes, exact calls confirm": given a `SurrogateProfile` (a surrogate of the binned
theory, `infer.model.emulated.EmulatedProblem` + `infer.theory.surrogate.Surrogate`; priors, nuisance terms
and the likelihood stay exact), each grid point is first minimised on the surrogate (free calls), and that
proposal is the start of the exact fit, which confirms it (a fresh finite-difference Jacobian predicting
less than ``chi2_tol`` decrease) or refines it. Every reported number comes from exact calls; the
surrogate's error at each proposal (surrogate minus exact −2 ln L there) is kept beside them.
"""
from __future__ import annotations

import logging
import math
import sys
import time
from dataclasses import dataclass, field

import numpy as np

from infer.config import support
from infer.errors import UserError
from infer.fit import bestfit, lm
from infer.fit.bands import BandModelFactory

log = logging.getLogger("infer")

#: The Δχ² levels of the reported intervals: 68.27 % and 95 % for one degree of freedom (Wilks).
LEVELS = (1.0, 3.84)
#: Default grid: the best fit ± this many Laplace σ (cut at the prior support).
SPAN_SIGMA = 3.0
MAX_POINTS = 1000


@dataclass
class Interval:
    level: float                  # Δχ² level
    lower: float
    upper: float
    lower_edge: str               # "" (a crossing), "grid edge" or "prior bound"
    upper_edge: str

    def text(self, fmt=".4g") -> str:
        def side(v, edge, word):
            return f"{v:{fmt}}" if not edge else f"{word} {v:{fmt}} ({edge})"
        return f"[{side(self.lower, self.lower_edge, '≤')}, {side(self.upper, self.upper_edge, '≥')}]"


@dataclass
class ProfileResult:
    param: str
    mode: str
    names: list                   # every sampled parameter
    grid: np.ndarray              # (N,) values of the profiled parameter
    neg2: np.ndarray              # (N,) −2 ln L (posterior mode: −2 ln L + Gaussian prior χ²) at each optimum
    points: np.ndarray            # (N, P) optimum of every grid point (the fixed value included)
    converged: np.ndarray         # (N,) bool
    calls: np.ndarray             # (N,) exact calls per grid point
    surrogate_error: np.ndarray   # (N,) surrogate − exact −2 ln L at the surrogate's proposal (nan: none)
    best: dict                    # the global best fit θ̂
    best_neg2: float
    best_sigma: float             # Laplace σ of the parameter at the global fit
    fit_calls: int
    prior: tuple                  # support of the profiled parameter
    surrogate: dict | None = None  # how the proposals were made (source, held-out error), or None
    notes: list = field(default_factory=list)
    seconds: float = 0.0

    @property
    def minimum(self) -> float:
        return float(min(self.best_neg2, np.nanmin(self.neg2)))

    @property
    def dchi2(self) -> np.ndarray:
        return self.neg2 - self.minimum

    def intervals(self) -> list[Interval]:
        return [interval(self.grid, self.dchi2, lev, self.prior) for lev in LEVELS]

    def parabola(self) -> tuple[float, float]:
        """(ψ̂, σ) of the parabola through the three grid points around the lowest."""
        return parabola(self.grid, self.neg2)

    @property
    def total_calls(self) -> int:
        return int(self.fit_calls + self.calls.sum())


# -- pure analysis -----------------------------------------------------------------------------------------
def parabola(x, y) -> tuple[float, float]:
    """Vertex and σ = 1/√a of y ≈ a(x − x̂)² + c through the lowest grid point and its neighbours."""
    x, y = np.asarray(x, float), np.asarray(y, float)
    i = int(np.clip(np.nanargmin(y), 1, len(x) - 2))
    a, b, _ = np.polyfit(x[i - 1:i + 2], y[i - 1:i + 2], 2)
    if not a > 0:
        return float(x[int(np.nanargmin(y))]), math.nan
    return float(-b / (2 * a)), float(1 / math.sqrt(a))


def interval(x, dchi2, level: float, prior=(-math.inf, math.inf)) -> Interval:
    """The {Δχ² ≤ level} interval around the minimum of a profile on grid ``x`` (module docstring)."""
    x, d = np.asarray(x, float), np.clip(np.asarray(dchi2, float), 0.0, None)
    i0 = int(np.nanargmin(d))
    centre = parabola(x, d)[0] if len(x) >= 3 else x[i0]
    s = np.sign(x - centre) * np.sqrt(d)                      # the signed root, linear for a parabola
    ends = []
    for step in (-1, 1):
        j = i0 + step
        while 0 <= j < len(x) and not d[j] >= level:
            j += step
        if 0 <= j < len(x):
            i = j - step
            target = step * math.sqrt(level)
            t = (target - s[i]) / (s[j] - s[i]) if s[j] != s[i] else 1.0
            ends.append((float(x[i] + np.clip(t, 0.0, 1.0) * (x[j] - x[i])), ""))
        else:
            edge, bound = (x[0], prior[0]) if step < 0 else (x[-1], prior[1])
            width = prior[1] - prior[0] if math.isfinite(prior[1] - prior[0]) else 0.0
            near = math.isfinite(bound) and abs(edge - bound) <= max(1e-6 * abs(x[-1] - x[0]), 2e-7 * width)
            ends.append((float(edge), "prior bound" if near else "grid edge"))
    (lo, le), (hi, he) = ends
    return Interval(level, lo, hi, le, he)


# -- the request -----------------------------------------------------------------------------------------
def check_request(cfg, param: str, points: int, span=None):
    """Validate the profiled parameter, the number of points and the range (before any theory call);
    returns (index, prior support)."""
    names = [p.name for p in cfg.sampled]
    if param not in names:
        fixed = " (it is fixed in the run file)" if param in cfg.fixed else ""
        raise UserError(f"{cfg.path}: no sampled parameter {param!r}{fixed}; sampled: {', '.join(names)}")
    if len(names) < 2:
        raise UserError(f"{cfg.path}: a profile needs at least two sampled parameters")
    if not (isinstance(points, int) and not isinstance(points, bool) and 3 <= points <= MAX_POINTS):
        raise UserError(f"--points must be an integer from 3 to {MAX_POINTS}, got {points!r}")
    k = names.index(param)
    lo, hi = support(cfg.sampled[k].prior)
    if span is not None:
        a, b = (float(v) for v in span)
        if not (math.isfinite(a) and math.isfinite(b) and a < b):
            raise UserError(f"--range must be two finite numbers LO < HI, got {a:g} {b:g}")
        if a < lo or b > hi:
            raise UserError(f"--range {a:g} {b:g} of {param} is outside its prior support [{lo:g}, {hi:g}] "
                            f"({cfg.path}: [parameters.{param}] prior)")
    return k, (float(lo), float(hi))


def _grid(centre, sigma, n, prior, span):
    lo, hi = prior
    width = (hi - lo) if math.isfinite(hi - lo) else max(abs(centre), 1.0)
    margin = 1e-7 * width
    if span is None:
        s = sigma if math.isfinite(sigma) and sigma > 0 else 0.05 * width
        span = (centre - SPAN_SIGMA * s, centre + SPAN_SIGMA * s)
    a, b = max(span[0], lo + margin), min(span[1], hi - margin)
    return np.linspace(a, b, n)


# -- the objective with one parameter held fixed ------------------------------------------------------------
class Held:
    """Residuals of the free parameters (scale units) with parameter ``k`` held at ``u_k``; ``inner`` is a
    residual function of all parameters (`bestfit.Objective` for exact calls, or a surrogate's)."""

    def __init__(self, inner, k: int, u_k: float, P: int):
        self.inner, self.k, self.u_k, self.P = inner, k, float(u_k), P
        self.first = None

    def full(self, U):
        U = np.atleast_2d(U)
        return np.insert(U, self.k, self.u_k, axis=1)

    def __call__(self, U):
        R = self.inner(self.full(U))
        if self.first is None:
            self.first = R[0].copy()
        return R


class SurrogateProfile:
    """Vectorised surrogate residuals [L⁻¹(d − m̃(θ)), Gaussian prior rows] for the proposals; the
    problem is an `EmulatedProblem` whose ``surrogate`` has been trained. ``info`` says where it came from."""

    def __init__(self, problem, info: dict):
        from scipy import linalg
        self.problem, self.info, self._solve = problem, dict(info), linalg.solve_triangular
        self.calls = 0

    def residuals(self, centre, scale, mu, sd):
        p, gauss = self.problem, np.isfinite(sd)

        def fun(U):
            T = centre + scale * np.atleast_2d(U)
            self.calls += len(T)
            m = p.model_from_theory(T, p.surrogate.predict_many(T[:, p.theory_index]))
            z = self._solve(p._chol, (p._data[None, :] - m).T, lower=True, check_finite=False).T
            return np.concatenate([z, (T[:, gauss] - mu[gauss]) / sd[gauss]], axis=1)
        return fun


def surrogate_from_chain(cfg, chain, model) -> SurrogateProfile:
    """The surrogate of a surrogate-engine chain file, refitted (no exact call) on every finite exact call
    it stores, with the Laplace approximation it stored; the chain's run must be ``cfg``'s posterior."""
    from infer.model.emulated import EmulatedProblem
    from infer.sampling.engine import Laplace
    from infer.sampling.exactlog import finite
    from infer.store.enginefile import EngineFile
    state = EngineFile(chain).read()
    rep = state.report or {}
    if "laplace_mean" not in rep or tuple(state.blob_names) != tuple(model.blob_names):
        raise UserError(f"{chain}: no finished surrogate-engine sample of this run to rebuild the surrogate from")
    rows = state.rows
    ok = finite(rows)
    problem = EmulatedProblem(cfg, model=model, surrogate_options={"method": cfg.surrogate.method})
    X = rows.position[ok]
    problem.train(X, problem.targets(X, rows.blobs[ok]),
                  Laplace(np.asarray(rep["laplace_mean"], float), np.asarray(rep["laplace_cov"], float)))
    return SurrogateProfile(problem, {"source": f"rebuilt from the {int(ok.sum())} exact calls of {chain}",
                                      "held_out": problem.surrogate.held_out_error()})


def train_surrogate(design_points: int | None = None):
    """A maker for `profile`: trains a surrogate on a Sobol design of exact calls around the global fit
    (``[surrogate] design_points`` / ``design_radius`` of the run unless given), as the engine does."""
    def make(model, evaluator, best):
        from infer.model.emulated import EmulatedProblem
        from infer.sampling.engine import Laplace
        from infer.theory.surrogate import sobol_design
        cfg = model.posterior.cfg
        problem = EmulatedProblem(cfg, model=model, surrogate_options={"method": cfg.surrogate.method})
        mean = np.array([best.best[n] for n in problem.names])
        cov = np.array(best.covariance, float)
        n = design_points or cfg.surrogate.design_size(len(mean))
        X = sobol_design(n, mean, cov, cfg.surrogate.design_radius, problem.lower, problem.upper, seed=int(cfg.seed))
        log.info("profile: training a surrogate on %d exact calls", n)
        lp, blobs, reasons = evaluator.evaluate(X)
        ok = np.isfinite(lp) & np.array([r is None for r in reasons])
        problem.train(X[ok], problem.targets(X[ok], np.asarray(blobs)[ok]), Laplace(mean, 0.5 * (cov + cov.T)))
        return SurrogateProfile(problem, {"source": f"trained on {int(ok.sum())} design calls around the best fit",
                                          "design_calls": int(n), "held_out": problem.surrogate.held_out_error()})
    return make


# -- the profile -----------------------------------------------------------------------------------------
def profile(cfg, param: str, *, points: int = 21, span=None, mode: str = "likelihood", evaluator=None,
            workers: int | None = None, options: lm.Options | None = None, surrogate=None, model=None,
            starts: int = 3, progress: bool | None = None) -> ProfileResult:
    """The profile of ``param`` on ``points`` values over ``span`` (default: best fit ± 3 Laplace σ, cut at
    the prior support). ``surrogate``: a `SurrogateProfile`, or a callable ``(model, evaluator, fit) ->
    SurrogateProfile | None`` made once the global fit is known (e.g. `train_surrogate`); None: exact fits
    only. Evaluator and workers as in `bestfit.fit`."""
    if mode not in bestfit.MODES:
        raise UserError(f"profile mode must be one of {', '.join(bestfit.MODES)}, got {mode!r}")
    k, prior = check_request(cfg, param, points, span)
    t0 = time.monotonic()
    factory = BandModelFactory(cfg)
    model = model if model is not None else factory()
    own = evaluator is None
    if own:
        from infer.parallel import make_evaluator
        workers = cfg.sampling.workers if workers is None else workers
        evaluator = make_evaluator(factory, workers, cfg.sampling.threads_per_worker, built=model)
    try:
        opts = options or lm.Options()
        best = bestfit.fit(cfg, starts=starts, mode=mode, evaluator=evaluator, model=model, options=opts)
        if callable(surrogate) and not isinstance(surrogate, SurrogateProfile):
            surrogate = surrogate(model, evaluator, best)
            if surrogate is not None:
                best.calls += int(surrogate.info.get("design_calls", 0))
        out = _walk(cfg, model, evaluator, best, k, prior, _grid(best.best[param], best.sigma[param], points,
                                                                 prior, span), mode, opts, surrogate, progress)
    finally:
        if own:
            evaluator.close()
    out.seconds = round(time.monotonic() - t0, 3)
    return out


def _walk(cfg, model, evaluator, best, k, prior, grid, mode, opts, surrogate, progress) -> ProfileResult:
    sampled = cfg.sampled
    names = [p.name for p in sampled]
    P = len(names)
    guess = np.array([p.guess for p in sampled])
    scale = np.array([p.spread for p in sampled])
    lo, hi = np.array([support(p.prior) for p in sampled], float).T
    mu = np.array([p.prior.args[0] if p.prior.kind != "uniform" else 0.0 for p in sampled])
    sd = np.array([p.prior.args[1] if p.prior.kind != "uniform" and mode == "posterior" else np.inf
                   for p in sampled])
    obj = bestfit.Objective(evaluator, model, guess, scale, mu, sd, posterior=mode == "posterior")
    nr = model.n_residuals
    sur_fun = surrogate.residuals(guess, scale, mu, sd) if surrogate is not None else None
    free = np.arange(P) != k
    lo_u, hi_u = ((lo - guess) / scale)[free], ((hi - guess) / scale)[free]
    u_best = (np.array([best.best[n] for n in names]) - guess) / scale
    N = len(grid)
    neg2 = np.full(N, np.nan)
    pts = np.full((N, P), np.nan)
    conv = np.zeros(N, bool)
    calls = np.zeros(N, int)
    sur_err = np.full(N, np.nan)
    start = int(np.argmin(np.abs(grid - best.best[names[k]])))
    order = list(range(start, N)) + list(range(start - 1, -1, -1))
    path: dict[int, np.ndarray] = {}
    bar = _Bar(N, progress, names[k])
    quiet = _Quiet()
    log.addFilter(quiet)                    # the per-iteration lines of the inner fits would swamp the log
    best_neg2 = best.neg2_log_like + (best.chi2_prior if mode == "posterior" else 0.0)
    try:
        for n_done, i in enumerate(order):
            u_k = (grid[i] - guess[k]) / scale[k]
            step = 1 if i >= start else -1
            prev, prev2 = path.get(i - step), path.get(i - 2 * step)
            u0 = u_best[free] if prev is None else prev
            if prev is not None and prev2 is not None:
                u0 = np.clip(2 * prev - prev2, lo_u, hi_u)      # linear extrapolation along the profile path
            starts_u = [u0] if prev is None or np.array_equal(u0, prev) else [u0, prev]
            if sur_fun is not None:
                sres = lm.minimize(Held(sur_fun, k, u_k, P), np.array(starts_u), lo_u, hi_u,
                                   lm.Options(fd_step=opts.fd_step, chi2_tol=1e-4, max_iterations=200))
                starts_u = [sres.u]
            held = Held(obj, k, u_k, P)
            try:
                res = lm.minimize(held, np.array(starts_u), lo_u, hi_u, opts)
            except lm.FitFailed as err:
                raise UserError(f"{cfg.path}: profile of {names[k]} at {grid[i]:.6g}: {err}") from None
            if (sur_fun is not None and held.first is not None and np.all(np.isfinite(held.first))
                    and len(sres.r) == len(held.first)):
                sur_err[i] = float(sres.chi2 - held.first @ held.first)
            path[i] = res.u
            pts[i] = obj.theta(held.full(res.u)[0])
            _, blob, _ = obj.record_at(pts[i])
            # −2 ln L as the best fit computes it, plus the Gaussian prior χ² in posterior mode
            neg2[i] = (-2.0 * model.like.loglike_bands(np.asarray(blob[:model.n_bands], float), model.nuisance(pts[i]))[0]
                       + float(np.sum(res.r[nr:] ** 2)))
            conv[i], calls[i] = res.converged, res.calls
            bar.update(n_done + 1, grid[i], neg2[i] - min(best_neg2, np.nanmin(neg2)), int(calls.sum()))
    finally:
        bar.close()
        log.removeFilter(quiet)
    notes = []
    if np.nanmin(neg2) < best_neg2 - max(opts.chi2_tol, 1e-9) * 10:
        notes.append(f"the profile reaches −2 ln L {np.nanmin(neg2):.3f}, below the global fit's "
                     f"{best_neg2:.3f}: the global fit had not found the optimum; Δχ² is taken from the profile")
    if not conv.all():
        notes.append(f"{int((~conv).sum())} grid point(s) did not converge (see the 'converged' column)")
    info = None
    if surrogate is not None:
        info = dict(surrogate.info, surrogate_calls=surrogate.calls)
    return ProfileResult(names[k], mode, names, grid, neg2, pts, conv, calls, sur_err, dict(best.best), best_neg2,
                         float(best.sigma[names[k]]), int(best.calls), prior, info, notes)


class _Quiet(logging.Filter):
    def filter(self, record):
        return not str(record.msg).startswith("fit: iteration")


class _Bar:
    """A live bar on a terminal (tqdm), a log line per grid point otherwise."""

    def __init__(self, total, interactive, name):
        self.total, self.name = total, name
        interactive = sys.stderr.isatty() if interactive is None else interactive
        self.bar = None
        if interactive:
            from tqdm import tqdm
            self.bar = tqdm(total=total, unit="point", dynamic_ncols=True, file=sys.stderr,
                            desc=f"profile {name}")

    def update(self, done, value, dchi2, calls):
        if self.bar is not None:
            self.bar.n = done
            self.bar.set_postfix_str(f"{self.name}={value:.5g} Δχ²={dchi2:.2f} calls={calls}", refresh=False)
            self.bar.refresh()
        else:
            log.info("profile %s: point %d/%d at %.6g, Δχ² %.3f, %d exact calls so far", self.name, done,
                     self.total, value, dchi2, calls)

    def close(self):
        if self.bar is not None:
            self.bar.close()
