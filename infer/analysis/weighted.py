"""Importance-weighted exact samples (the surrogate engine's output) and their marginal constraints.

The surrogate engine (`infer.sampling.engine`) ends with N exact posterior evaluations at draws of a
proposal and an unnormalised log importance weight for each (deterministic-mixture weights over the
correction rounds). `WeightedSample` holds them in the shape the summary needs — the weighted twin of
`infer.analysis.samples.Samples` — and `weighted_constraints` gives the same `Constraint` rows as the
plain path (`infer.analysis.marginals.constraints`), computed by the same code (`marginals.marginal`):

* Moments and intervals with the normalised weights w̃: mean Σ w̃ x; sd with the 1/(1 − Σ w̃²) factor
  (ddof = 1 for equal weights); 68 % and 95 % *central* (equal-tailed) intervals from the weighted
  quantiles of `marginals.quantile` (mid-points of each draw's weight, stretched so the extreme draws
  sit at 0 and 1: Hyndman & Fan 1996 definition 7 for equal weights). One-sided limits at a prior edge
  by `marginals.edge_limit` with weights (the same rule, fractions of weight instead of draws).
  The raw deterministic-mixture weights are used (those whose Kish ESS and k̂ the engine judged), not
  Pareto-smoothed ones: with k̂ < 0.7 both are consistent and the raw ones carry no smoothing bias.
* Monte Carlo standard errors from the weights, for independent draws of the proposal (the delta method
  for self-normalised importance sampling; Owen 2013, *Monte Carlo theory, methods and examples*,
  ch. 9): mean, sqrt(Σ w̃² (x − μ̂)²); sd, sqrt(Σ w̃² ((x − μ̂)² − σ̂²)²) / (2σ̂); a quantile q_p, by
  carrying the error of the weighted CDF at q_p, s_p = sqrt(Σ w̃² (1{x ≤ q_p} − p)²), through the
  quantile function, s_p (Q(p + δ) − Q(p − δ))/(2δ) with δ = min(2s_p, p, 1 − p) (the inversion used
  for quantile MCSEs by Vehtari et al. 2021, Bayesian Analysis 16, 667, §4.3, here with the
  importance-sampling variance; from memory).
  The ±2 s_p band, rather than ±s_p, gives a steadier slope of Q from a few hundred effective draws: in
  our calibration (tests/test_weighted_summary.py) ±s_p understated the error of a 97.5 % point by
  15 %, ±2 s_p by under 6 %.
  Effective draws for the mean of a quantity: σ̂² / MCSE(mean)², the number of independent exact draws
  that would give the same error.
* Whole-sample diagnostics in place of R̂/ESS/τ: Kish's effective sample size (Kish 1965) and the
  Pareto k̂ of the weights (PSIS; Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25, 72: estimates are
  reliable for k̂ < min(1 − 1/log₁₀ S, 0.7)), from `infer.analysis.weights`.
* Best exact draw: the draw with the highest exact ln posterior (not an optimised maximum).

`engine_info` turns an `EngineResult` into the plain dict the tables, figures and status report read.
Pure NumPy; nothing here writes files.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from infer.analysis import weights as wts
from infer.analysis.burnin import default_targets
from infer.analysis.marginals import Constraint, marginal, quantile

#: Pareto-k̂ bound above which importance-sampling estimates are unreliable (Vehtari et al. 2024).
KHAT_MAX = 0.7


@dataclass
class WeightedSample:
    """Exact posterior evaluations at proposal draws with importance weights. Shapes: (n, P), (n, D), (n,)."""

    names: tuple[str, ...]                 # sampled parameters, in vector order
    derived_names: tuple[str, ...]         # derived quantities
    position: np.ndarray                   # (n, P)
    derived: np.ndarray                    # (n, D)
    log_post: np.ndarray                   # (n,) exact ln posterior (−inf: outside the support)
    log_like: np.ndarray                   # (n,) exact ln likelihood (nan when unknown)
    log_weight: np.ndarray                 # (n,) unnormalised ln importance weight (−inf: zero weight)
    tex: dict[str, str] = field(default_factory=dict)
    bounds: dict[str, tuple[float, float]] = field(default_factory=dict)
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        self.names, self.derived_names = tuple(self.names), tuple(self.derived_names)
        self.position = np.asarray(self.position, float).reshape(-1, len(self.names))
        n = len(self.position)
        self.derived = np.asarray(self.derived, float).reshape(n, len(self.derived_names))
        for key in ("log_post", "log_like", "log_weight"):
            a = np.asarray(getattr(self, key), float).ravel()
            if a.size != n:
                raise ValueError(f"weighted sample: {key} has {a.size} entries for {n} draws")
            setattr(self, key, a)
        lw = self.log_weight
        if np.any(np.isnan(lw)) or np.any(lw == np.inf):
            raise ValueError("weighted sample: log weights contain NaN or +inf")
        if n == 0 or not np.any(np.isfinite(lw)):
            raise ValueError("weighted sample: no draw has a positive weight")

    @classmethod
    def from_engine(cls, result, names, blob_names, *, tex=None, bounds=None, meta=None) -> "WeightedSample":
        """From an `infer.sampling.engine.EngineResult` whose blob fields are ``blob_names`` (the
        posterior's, ``("log_like", derived…)``; a field named ``log_like`` becomes `log_like`, a field
        named None is left out, the rest are the derived quantities)."""
        blobs = np.asarray(result.blobs, float)
        blob_names = tuple(blob_names)
        n = len(np.asarray(result.log_post))
        blobs = blobs.reshape(n, -1) if blobs.size else np.empty((n, 0))
        if blobs.shape[1] != len(blob_names):
            raise ValueError(f"weighted sample: {blobs.shape[1]} blob fields for names {blob_names}")
        keep = [i for i, b in enumerate(blob_names) if b not in ("log_like", None)]
        log_like = blobs[:, blob_names.index("log_like")] if "log_like" in blob_names else np.full(n, np.nan)
        return cls(tuple(names), tuple(blob_names[i] for i in keep), result.position, blobs[:, keep],
                   result.log_post, log_like, result.log_weight, dict(tex or {}), dict(bounds or {}),
                   dict(meta or {}))

    @property
    def n(self) -> int:
        return len(self.log_weight)

    @property
    def all_names(self) -> tuple[str, ...]:
        return self.names + self.derived_names

    @property
    def weights(self) -> np.ndarray:
        """Normalised weights w̃ (Σ = 1), zero where the log weight is −inf."""
        return wts.normalised_weights(self.log_weight)

    @property
    def ess(self) -> float:
        """Kish's effective sample size (Σw)²/Σw² of the weights."""
        return wts.kish_ess(self.log_weight)

    def column(self, name: str) -> np.ndarray:
        """Values of one sampled or derived quantity, shaped (n,) (a view)."""
        if name in self.names:
            return self.position[:, self.names.index(name)]
        if name in self.derived_names:
            return self.derived[:, self.derived_names.index(name)]
        raise KeyError(name)

    def label(self, name: str) -> str:
        return self.tex.get(name, name.replace("_", r"\_"))

    def best_index(self) -> int:
        """Index of the draw with the highest exact ln posterior (the first of equals)."""
        lp = np.where(np.isfinite(self.log_post), self.log_post, -np.inf)
        return int(np.argmax(lp))


# -- Monte Carlo errors ---------------------------------------------------------------------------------


def mcse(x: np.ndarray, w: np.ndarray, est: dict) -> dict:
    """Monte Carlo standard errors (module docstring) of the estimates ``est`` (`marginals.marginal`'s
    mean, sd, median, lo68, hi68, lo95, hi95) of draws ``x`` with normalised weights ``w``."""
    w2 = w * w
    d = x - est["mean"]
    out = {"mean": float(np.sqrt(np.dot(w2, d * d)))}
    var = float(np.dot(w, d * d))
    sd = est["sd"]
    out["sd"] = float(np.sqrt(np.dot(w2, (d * d - var) ** 2)) / (2 * sd)) if sd > 0 else float("nan")
    for key, p in (("median", 0.5), ("lo68", 0.16), ("hi68", 0.84), ("lo95", 0.025), ("hi95", 0.975)):
        ind = (x <= est[key]).astype(float)
        s_p = float(np.sqrt(np.dot(w2, (ind - p) ** 2)))
        delta = min(2 * s_p, p, 1 - p)                  # the band stays inside [0, 1], symmetric about p
        a, b = quantile(x, [p - delta, p + delta], w)
        out[key] = float(s_p * (b - a) / (2 * delta)) if delta > 0 else 0.0
    return out


# -- constraints ----------------------------------------------------------------------------------------


def weighted_constraints(ws: WeightedSample, *, targets=None, khat_max: float = KHAT_MAX
                         ) -> tuple[list[Constraint], dict]:
    """Marginal constraints of every sampled and derived quantity of a weighted exact sample.

    ``targets``: the run's `infer.config.Stopping` (only ``ess_above``, the weight-ESS target, is used);
    None uses its defaults. ``khat_max``: the Pareto-k̂ bound (0.7, Vehtari et al. 2024).

    Returns (constraints, info). Each `Constraint` has nan R̂, chain ESS and τ, ``mcse`` (dict of Monte
    Carlo errors) and ``ess_weight`` (effective draws for its mean). ``info``: weighted (True), draws,
    draws_used (positive weight), ess (Kish), ess_target, khat, khat_max, khat_threshold (the sample-size
    bound min(1 − 1/log₁₀ S, 0.7)), max_weight (largest normalised weight), weights_ok (ESS ≥ target and
    k̂ below both bounds), low_ess (names whose mean has fewer effective draws than the target),
    prior_dominated, nonfinite ({name: positive-weight draws left out}), best (index, log_post, log_like).
    """
    targets = targets or default_targets()
    et = float(targets.ess_above)
    lw = ws.log_weight
    w_all = ws.weights
    pos = w_all > 0
    diag = wts.weight_diagnostics(lw)
    ibest = ws.best_index()
    cons: list[Constraint] = []
    prior_dominated, nonfinite, low_ess = [], {}, []
    for name in ws.all_names:
        col = ws.column(name)
        good = pos & np.isfinite(col)
        if (pos & ~np.isfinite(col)).any():
            nonfinite[name] = int((pos & ~np.isfinite(col)).sum())
        if not good.any():
            raise ValueError(f"weighted sample: quantity {name!r} has no finite value with positive weight")
        x, w = col[good], w_all[good] / w_all[good].sum()
        sampled = name in ws.names
        m = marginal(x, ws.bounds.get(name) if sampled else None, w)
        if m.pop("fills_prior"):
            prior_dominated.append(name)
        err = mcse(x, w, m)
        ess_w = m["sd"] ** 2 / err["mean"] ** 2 if err["mean"] > 0 else float("nan")
        c = Constraint(name=name, tex=ws.label(name), **m, best=float(col[ibest]), rhat=float("nan"),
                       ess_bulk=float("nan"), ess_tail=float("nan"), tau=float("nan"), sampled=sampled,
                       trusted=True, mcse=err, ess_weight=float(ess_w))
        if c.flagged(float("nan"), et):
            low_ess.append(name)
        cons.append(c)
    ess, khat = float(diag["kish_ess"]), float(diag["pareto_k"])
    threshold = float(diag["pareto_k_threshold"])
    info = {
        "weighted": True, "draws": ws.n, "draws_used": int(pos.sum()), "ess": ess, "ess_target": et,
        "khat": khat, "khat_max": float(khat_max), "khat_threshold": threshold,
        "max_weight": float(diag["max_weight"]),
        "weights_ok": bool(ess >= et and khat < khat_max and khat < threshold),
        "low_ess": low_ess, "prior_dominated": prior_dominated, "nonfinite": nonfinite,
        "best": {"index": ibest, "log_post": float(ws.log_post[ibest]), "log_like": float(ws.log_like[ibest])},
    }
    return cons, info


# -- the engine's figures as plain values ------------------------------------------------------------


def engine_info(result, *, ess_target: float, khat_max: float = KHAT_MAX, exact_rows=None,
                eta_seconds: float | None = None) -> dict:
    """Plain-value account of an `EngineResult` for the tables, the weights figure and ``infer status``.

    ``exact_rows``: the run's `infer.sampling.exactlog.Rows` (every exact call with its stage); without
    them the fit's calls are taken from the Laplace record and the design's are the remainder.
    Keys: stage, exact_calls, theory_calls, calls_by_stage {fit, design, correct}, refits, rounds (list of
    {refit, n, khat, ess, heldout_rms, heldout_worst, calls_after, ess_so_far}), chain (the last surrogate
    chain's verdict), ess, ess_target, khat, khat_max, ln_z, ln_z_err, converged, missing, eta_seconds.
    ``ess_so_far`` is the Kish ESS of the final weights of the draws made up to that round.
    """
    rounds = list(result.rounds)
    correct = int(sum(r.n for r in rounds))
    if exact_rows is not None:
        from infer.sampling.exactlog import STAGES
        stage = np.asarray(exact_rows.stage)
        by_stage = {k: int(np.sum(stage == code)) for k, code in STAGES.items()}
    else:
        fit = int(getattr(result.laplace, "calls", 0) or 0)
        by_stage = {"fit": fit, "design": max(int(result.exact_calls) - fit - correct, 0), "correct": correct}
    before = by_stage["fit"] + by_stage["design"]
    lw = np.asarray(result.log_weight, float)
    out_rounds, done = [], 0
    for r in rounds:
        done += int(r.n)
        sub = lw[:int(r.start) + int(r.n)]
        out_rounds.append({"refit": int(r.refit), "n": int(r.n), "khat": float(r.khat), "ess": float(r.ess),
                           "heldout_rms": float(r.heldout_rms), "heldout_worst": float(r.heldout_worst),
                           "calls_after": before + done,
                           "ess_so_far": wts.kish_ess(sub) if np.isfinite(sub).any() else 0.0})
    return {
        "stage": getattr(result, "stage", "done"), "exact_calls": int(result.exact_calls),
        "theory_calls": int(result.theory_calls), "calls_by_stage": by_stage, "refits": int(result.refits),
        "rounds": out_rounds, "chain": dict(result.chain), "ess": float(result.ess),
        "ess_target": float(ess_target), "khat": float(result.khat), "khat_max": float(khat_max),
        "ln_z": float(result.ln_z), "ln_z_err": float(result.ln_z_err), "converged": bool(result.converged),
        "missing": [str(m) for m in result.missing],
        "eta_seconds": None if eta_seconds is None else float(eta_seconds),
    }

