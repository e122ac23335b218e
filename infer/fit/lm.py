"""Levenberg–Marquardt for bounded non-linear least squares, with batched finite-difference Jacobians.

Minimises χ²(u) = ‖r(u)‖² over a box lo ≤ u ≤ hi, for residuals r (M,) of P parameters u (already
divided by their scale, so one unit is about one starting spread). The method is the trust-region form of
Levenberg–Marquardt (Nocedal & Wright 2006, *Numerical Optimization*, 2nd ed., ch. 10.3; Moré 1978, in
*Numerical Analysis*, Lecture Notes in Mathematics 630, 105): each step solves

    min ‖r + J p‖²  subject to  ‖D p‖ ≤ Δ ,

with D the running maximum of J's column norms (Moré's scaling), exactly through the SVD of J (the
secular equation ‖D p(λ)‖ = Δ solved for the damping λ), and Δ updated from the ratio ρ of actual to
predicted χ² reduction with Moré's rules (shrink by a factor 0.1–0.5 from a quadratic interpolation when
ρ < 0.25, double when ρ > 0.75). Damping is what keeps a step from diverging where the posterior is not
Gaussian: a plain Gauss–Newton step (λ = 0) may raise χ² by an order of magnitude there.

Bounds (the prior support): parameters on a bound whose gradient points outwards are held fixed, the
step is solved in the others, and a step that would leave the box is cut at the boundary, the cut
parameters fixed and the rest re-solved (a projected active-set step). Parameters that end on a bound are
reported. Points are kept a hair (1e-9 of the scale) inside the box, because the support is open.

Cost in exact calls, the quantity that matters with a Boltzmann code:

* the Jacobian is by central differences, its 2P points evaluated in ONE call of ``fun`` (so a worker
  pool or MPI ranks compute them in parallel); beside a bound the second-order one-sided formula
  (−3 r₀ + 4 r₁ − r₂)/2h replaces it, with the same two points per parameter;
* the step is ``fd_step`` scale units (0.3 starting spreads by default: on the demo, whose spreads are
  about one σ, the Laplace σ's from steps of 0.3 and 1.0 spreads agree within 0.35 %, those from 0.1
  spreads differ by up to 0.9 % — CAMB's numerical noise; measured);
* between fresh Jacobians J is updated by Broyden's rank-one formula (Broyden 1965, Math. Comp. 19, 577)
  from every trial point, at no extra call; a fresh Jacobian is computed only to confirm convergence (it
  is also the curvature reported at the optimum) or when two steps in a row fail;
* several starts share the first Jacobian, their trial points go into one call, and a start that comes
  within ``merge`` (in Δχ², measured with J) of a better one is dropped as the same optimum.

Stopping: at a fresh Jacobian, the predicted χ² decrease of the full bounded Gauss–Newton step (the
squared Newton decrement: (distance to the optimum in σ)²) below ``chi2_tol``; an accepted step with a
relative χ² change below ``ftol`` or a length below ``xtol``, or a Broyden Jacobian predicting less than
``chi2_tol``, only asks for that confirmation. Three failed trials in a row at a fresh Jacobian end the
start: converged when the predicted decrease is below 10 ``chi2_tol`` (the model's numerical noise floor),
else stalled; ``max_iterations`` or ``max_calls`` end it unconverged. The default ``chi2_tol`` = 0.01
locates the optimum to about 0.1 σ and sits at CAMB's noise floor: on the demo at accuracy "fast", steps
of 0.025 σ in θ_* change χ² non-monotonically by up to ±0.02 (measured), so a tighter tolerance only
chases noise. For smooth models (tests) pass a tighter one.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

log = logging.getLogger("infer")

_INSIDE = 1e-9          # points stay this far (in scale units) inside the box: the prior support is open


@dataclass(frozen=True)
class Options:
    fd_step: float = 0.3          # finite-difference step, in scale units (starting spreads)
    chi2_tol: float = 0.01        # predicted χ² decrease at a fresh Jacobian that counts as converged
    ftol: float = 1e-8            # relative χ² change of an accepted step
    xtol: float = 1e-8            # step length (scale units)
    max_iterations: int = 100
    max_calls: int | None = None  # a hard budget of evaluated points; None: no budget
    merge: float = 0.1            # Δχ² under which two starts are the same optimum
    radius: float = 100.0         # initial trust radius ‖D p‖ (√χ² units; Moré's factor)
    broyden: bool = True


@dataclass
class Start:
    """One start's state (internal, reported per start)."""
    index: int
    u: np.ndarray
    r: np.ndarray
    chi2: float
    jac: np.ndarray | None = None
    fresh: bool = False                 # J computed by finite differences at u
    diag: np.ndarray | None = None      # Moré's D
    radius: float = 100.0
    failures: int = 0                   # consecutive rejected steps
    candidate: bool = False             # a small step: confirm with a fresh Jacobian
    pred: float = math.inf              # predicted decrease of the full step at the last fresh Jacobian
    status: str = "running"             # running | converged | merged | stopped
    reason: str = ""
    path: list = field(default_factory=list)   # χ² after each accepted step


@dataclass
class Result:
    u: np.ndarray                       # best point (scale units)
    r: np.ndarray                       # residuals there
    chi2: float
    jac: np.ndarray                     # Jacobian at u (fresh when converged)
    jac_fresh: bool
    converged: bool
    reason: str
    calls: int
    iterations: int
    at_lower: np.ndarray                # (P,) bool
    at_upper: np.ndarray
    starts: list                        # per start: dict(index, chi2, status, reason)


class _Counted:
    """Wraps ``fun`` and counts every evaluated point (every exact call)."""

    def __init__(self, fun, max_calls):
        self.fun, self.max_calls, self.calls = fun, max_calls, 0

    def room(self, n: int) -> bool:
        return self.max_calls is None or self.calls + n <= self.max_calls

    def __call__(self, points: np.ndarray) -> np.ndarray:
        points = np.atleast_2d(points)
        self.calls += len(points)
        R = np.asarray(self.fun(points), float)
        if R.ndim != 2 or len(R) != len(points):
            raise ValueError("the residual function must return one row per point")
        return R


def _chi2(r: np.ndarray) -> float:
    return float(r @ r) if np.all(np.isfinite(r)) else math.inf


# -- finite differences ----------------------------------------------------------------------------------
def stencil(u: np.ndarray, h: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The 2P points of the Jacobian at u, and per parameter its direction: 0 central, +1 forward
    (u, u+h, u+2h: beside the lower bound), −1 backward (beside the upper bound)."""
    P = len(u)
    pts, side = np.repeat(u[None, :], 2 * P, axis=0), np.zeros(P, int)
    for i in range(P):
        hi_room, lo_room = hi[i] - u[i], u[i] - lo[i]
        step = min(h[i], 0.5 * max(hi_room, lo_room))
        if lo_room >= step and hi_room >= step:
            pts[2 * i, i] += step
            pts[2 * i + 1, i] -= step
        elif hi_room >= lo_room:
            side[i] = 1
            step = min(step, 0.5 * hi_room)
            pts[2 * i, i] += step
            pts[2 * i + 1, i] += 2 * step
        else:
            side[i] = -1
            step = min(step, 0.5 * lo_room)
            pts[2 * i, i] -= step
            pts[2 * i + 1, i] -= 2 * step
    return pts, side


def jacobian_from(u, r0, pts, side, R) -> np.ndarray:
    """Assemble J (M, P) from the stencil results R (2P, M); a failed point falls back to the other
    side's first-order difference, two failed points give a zero column (the parameter is not moved)."""
    P = len(u)
    J = np.zeros((len(r0), P))
    for i in range(P):
        a, b = R[2 * i], R[2 * i + 1]
        ha, hb = pts[2 * i, i] - u[i], pts[2 * i + 1, i] - u[i]
        ok_a, ok_b = np.all(np.isfinite(a)), np.all(np.isfinite(b))
        if ok_a and ok_b:
            J[:, i] = (a - b) / (ha - hb) if side[i] == 0 else (-3 * r0 + 4 * a - b) / (2 * ha)
        elif ok_a:
            J[:, i] = (a - r0) / ha
        elif ok_b:
            J[:, i] = (b - r0) / hb
        else:
            log.warning("fit: both finite-difference points of parameter %d failed; it is held fixed", i)
    return J


# -- one step ----------------------------------------------------------------------------------------------
def _tr_step(J, r, d, radius):
    """argmin ‖r + J p‖ s.t. ‖d ⊙ p‖ ≤ radius, exactly via the SVD of J D⁻¹; returns (p, λ)."""
    Js = J / d
    U, s, Vt = np.linalg.svd(Js, full_matrices=False)
    keep = s > s[0] * 1e-12 if len(s) and s[0] > 0 else np.zeros(len(s), bool)
    beta = U.T @ r

    def q(lam):
        w = np.where(keep, s / (s * s + lam), 0.0)
        return -(Vt.T @ (w * beta))

    q0 = q(0.0)
    if np.linalg.norm(q0) <= radius:
        return q0 / d, 0.0
    g = np.linalg.norm(Js.T @ r)
    lam_hi = max(g / radius, 1e-300)
    while np.linalg.norm(q(lam_hi)) > radius:
        lam_hi *= 10
    lam = optimize.brentq(lambda t: np.linalg.norm(q(t)) - radius, 0.0, lam_hi, xtol=1e-14, rtol=1e-10)
    return q(lam) / d, lam


def bounded_step(J, r, u, lo, hi, d, radius):
    """A trust-region step that stays in the box (active-set projection); returns (p, λ, predicted Δχ²)."""
    P = len(u)
    g = J.T @ r
    fixed = ((u - lo <= 2 * _INSIDE) & (g > 0)) | ((hi - u <= 2 * _INSIDE) & (g < 0))
    p, lam = np.zeros(P), 0.0
    for _ in range(P + 1):
        free = ~fixed
        if not free.any():
            break
        rr = r + J[:, fixed] @ p[fixed]
        left = math.sqrt(max(radius ** 2 - float(np.sum((d[fixed] * p[fixed]) ** 2)), 0.0))
        pf, lam = _tr_step(J[:, free], rr, d[free], left)
        p[free] = pf
        out = (u + p < lo) | (u + p > hi)
        if not out.any():
            break
        p = np.clip(u + p, lo, hi) - u
        fixed = fixed | out
    pred = float(r @ r - np.sum((r + J @ p) ** 2))
    return p, lam, pred


def _shrink(actual, p, J, lam, d):
    """Moré's factor (0.1–0.5) for a poor step, from a quadratic interpolation along p."""
    dirder = -(float(np.sum((J @ p) ** 2)) + lam * float(np.sum((d * p) ** 2)))
    if not math.isfinite(actual):
        return 0.1
    temp = 0.5 if actual >= 0 else 0.5 * dirder / (dirder + 0.5 * actual)
    return float(min(max(temp, 0.1), 0.5)) if math.isfinite(temp) else 0.1


# -- the driver --------------------------------------------------------------------------------------------
def minimize(fun, starts, lower, upper, options: Options = Options(), h=None) -> Result:
    """Minimise ‖fun(u)‖² from each row of ``starts`` (S, P) within [lower, upper].

    ``fun(points (n, P)) -> R (n, M)``: residuals per point, a row with a non-finite entry for a point
    that could not be computed. ``h`` (P,) overrides the finite-difference steps (default ``fd_step``).
    """
    o = options
    lo = np.asarray(lower, float) + _INSIDE
    hi = np.asarray(upper, float) - _INSIDE
    starts = np.clip(np.atleast_2d(np.asarray(starts, float)), lo, hi)
    P = starts.shape[1]
    h = np.full(P, o.fd_step) if h is None else np.asarray(h, float)
    f = _Counted(fun, o.max_calls)
    R0 = f(starts)
    runs = [Start(i, u.copy(), r, _chi2(r), radius=o.radius) for i, (u, r) in enumerate(zip(starts, R0))]
    ok = [s for s in runs if math.isfinite(s.chi2)]
    if not ok:
        raise FitFailed("every starting point failed to evaluate")
    for s in runs:
        if not math.isfinite(s.chi2):
            s.status, s.reason = "stopped", "start could not be evaluated"
    first = min(ok, key=lambda s: s.chi2)
    _fresh(f, [first], h, lo, hi)
    for s in ok:
        if s is not first:
            s.jac, s.diag = first.jac.copy(), first.diag.copy()
    iterations = 0
    while True:
        live = [s for s in runs if s.status == "running"]
        if not live:
            break
        need = [s for s in live if (s.candidate or s.failures >= 2) and not s.fresh]
        if need:
            if not f.room(2 * P * len(need)):
                for s in live:
                    s.status, s.reason = "stopped", "call budget exhausted"
                break
            _fresh(f, need, h, lo, hi)
            for s in need:
                s.failures = 0
        for s in live:
            if s.fresh and (s.candidate or s.failures == 0):
                p, _, pred = bounded_step(s.jac, s.r, s.u, lo, hi, s.diag, math.inf)
                log.debug("fit: start %d at a fresh Jacobian: χ² %.4f, predicted decrease %.3g",
                          s.index, s.chi2, pred)
                s.pred = pred
                if pred < o.chi2_tol:
                    s.status = "converged"
                    s.reason = f"predicted χ² decrease {pred:.2g} < {o.chi2_tol:g} at a fresh Jacobian"
            s.candidate = False
        live = [s for s in runs if s.status == "running"]
        if not live:
            break
        if iterations >= o.max_iterations:
            for s in live:
                s.status, s.reason = "stopped", f"{o.max_iterations} iterations without convergence"
            break
        if not f.room(len(live)):
            for s in live:
                s.status, s.reason = "stopped", "call budget exhausted"
            break
        # A start whose (updated) Jacobian predicts no useful decrease goes straight to a fresh Jacobian.
        for s in live:
            if not s.fresh and bounded_step(s.jac, s.r, s.u, lo, hi, s.diag, math.inf)[2] < o.chi2_tol:
                s.candidate = True
        live = [s for s in live if not s.candidate]
        if not live:
            continue
        iterations += 1
        steps = [bounded_step(s.jac, s.r, s.u, lo, hi, s.diag, s.radius) for s in live]
        trials = np.array([np.clip(s.u + p, lo, hi) for s, (p, _, _) in zip(live, steps)])
        Rt = f(trials)
        for s, (p, lam, pred), ut, rt in zip(live, steps, trials, Rt):
            p = ut - s.u
            c2 = _chi2(rt)
            actual = s.chi2 - c2
            rho = actual / pred if pred > 0 else -math.inf
            pnorm = float(np.linalg.norm(s.diag * p))
            moved = math.isfinite(c2) and rho > 1e-4
            if not s.path and s.failures == 0:        # Moré: the first radius is at most the first step
                s.radius = min(s.radius, pnorm) if pnorm > 0 else s.radius
            if rho < 0.25 or not math.isfinite(c2):
                cap = pnorm / 0.1 if pnorm > 0 else s.radius
                s.radius = _shrink(actual, p, s.jac, lam, s.diag) * min(s.radius, cap)
            elif lam == 0 or rho > 0.75:
                s.radius = max(s.radius, 2 * pnorm)
            if math.isfinite(c2) and o.broyden and p @ p > 0 and (moved or not s.fresh):
                s.jac = s.jac + np.outer(rt - s.r - s.jac @ p, p) / float(p @ p)
                s.diag = np.maximum(s.diag, np.linalg.norm(s.jac, axis=0))
            log.debug("fit: start %d iteration %d: χ² %.4f → %.4f (ρ %.3f, λ %.3g, Δ %.3g)",
                      s.index, iterations, s.chi2, c2, rho, lam, s.radius)
            if moved:
                small = (abs(actual) <= o.ftol * s.chi2
                         or float(np.linalg.norm(p)) <= o.xtol * (o.xtol + float(np.linalg.norm(s.u))))
                s.u, s.r, s.chi2 = ut, rt, c2
                s.fresh, s.failures = False, 0
                s.candidate = small or (pred < o.chi2_tol)
                s.path.append(c2)
            else:
                s.failures += 1
                if s.fresh and s.failures >= 3:
                    # No decrease along the predicted direction at a fresh Jacobian: the model's own
                    # numerical noise (a Boltzmann code's) is as large as the decrease left to find.
                    near = s.pred < 10 * o.chi2_tol
                    s.status = "converged" if near else "stopped"
                    s.reason = (f"no decrease found in 3 trials at a fresh Jacobian (predicted {s.pred:.2g}): "
                                + ("at the model's numerical noise floor" if near else "stalled"))
        if not o.broyden:
            for s in live:
                s.candidate = s.candidate or s.status == "running"
        _merge(runs, o.merge)
        best = min((s for s in runs if s.status in ("running", "converged")), key=lambda s: s.chi2, default=None)
        if best is not None:
            log.info("fit: iteration %d, best χ² %.3f, %d exact calls so far", iterations, best.chi2, f.calls)
    pool = [s for s in runs if s.status in ("converged", "stopped") and math.isfinite(s.chi2)]
    best = min(pool, key=lambda s: (s.status != "converged", s.chi2))
    conv = [s for s in pool if s.status == "converged"]
    if conv:
        best = min(conv, key=lambda s: s.chi2)
        better = [s for s in pool if s.chi2 < best.chi2 - o.merge]
        if better:                              # an unconverged start found a lower χ²: do not hide it
            best = min(better, key=lambda s: s.chi2)
    at_lower = best.u - lo <= 2 * _INSIDE + 1e-12
    at_upper = hi - best.u <= 2 * _INSIDE + 1e-12
    return Result(best.u, best.r, best.chi2, best.jac, best.fresh, best.status == "converged", best.reason,
                  f.calls, iterations, at_lower, at_upper,
                  [{"index": s.index, "chi2": s.chi2, "status": s.status, "reason": s.reason,
                    "start": starts[s.index].tolist(), "end": s.u.tolist()} for s in runs])


class FitFailed(Exception):
    """No start could be evaluated."""


def _fresh(f, group, h, lo, hi):
    """Fresh finite-difference Jacobians for every start in ``group``, all 2P·len(group) points in one call."""
    stencils = [stencil(s.u, h, lo, hi) for s in group]
    R = f(np.concatenate([pts for pts, _ in stencils]))
    P = len(h)
    for k, (s, (pts, side)) in enumerate(zip(group, stencils)):
        s.jac = jacobian_from(s.u, s.r, pts, side, R[2 * P * k: 2 * P * (k + 1)])
        norms = np.linalg.norm(s.jac, axis=0)
        norms[norms == 0] = 1.0
        s.diag = norms if s.diag is None else np.maximum(s.diag, norms)
        s.fresh = True


def _merge(runs, threshold):
    """Drop a start that has reached a better start's basin: Δχ² = ‖J (u_a − u_b)‖² < threshold."""
    act = sorted((s for s in runs if s.status in ("running", "converged")), key=lambda s: s.chi2)
    for i, a in enumerate(act):
        if a.status == "merged":
            continue
        for b in act[i + 1:]:
            if b.status != "merged" and float(np.sum((a.jac @ (a.u - b.u)) ** 2)) < threshold:
                b.status, b.reason = "merged", f"reached the optimum of start {a.index}"
