"""Importance weights: diagnostics, smoothing, mixture proposals, weighted summaries and the evidence.

Pure NumPy/SciPy functions on arrays of *log* weights (any additive constant); nothing here knows about
chain files, configs or theories. Importance sampling (e.g. Owen 2013, *Monte Carlo theory, methods and
examples*, ch. 9): draws x_i ~ q, weights w_i = p(x_i)/q(x_i), estimates E_p[f] ≈ Σ w_i f_i / Σ w_i
("self-normalised"; p and q need only be known up to constants).

Methods implemented
-------------------
* `kish_ess` — Kish's effective sample size (Kish 1965, *Survey Sampling*, Wiley): (Σw)² / Σw².
* `psis` — Pareto-smoothed importance sampling (Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25(72),
  1–58): a generalised Pareto distribution is fitted to the M = min(⌈S/5⌉, ⌈3√S⌉) largest weights above
  the (M+1)-th largest, by the profile-likelihood empirical-Bayes estimator of Zhang & Stephens (2009,
  Technometrics 51, 316) with the paper's weakly informative prior on the shape (k̂ ← (M k̂ + 10·0.5)/(M +
  10)); the tail weights are replaced by the fitted quantiles at (j − ½)/M and capped at the largest raw
  weight. k̂ is the diagnostic: estimates are reliable for k̂ < min(1 − 1/log₁₀ S, 0.7)
  (`pareto_k_threshold`); above 0.7 the weights' variance is effectively infinite.
* `defensive_log_density` — defensive mixture proposal (Hesterberg 1995, Technometrics 37, 185):
  q = (1 − α) q₁ + α q₂ with a heavy-tailed q₂, so that w = p/q ≤ p/(α q₂) stays bounded.
* `deterministic_mixture_log_weights` — several rounds of draws from different proposals q_r (n_r draws
  each, N in all) pooled without discarding any: w_i = p(x_i) / Σ_r (n_r/N) q_r(x_i), the balance heuristic
  of Veach & Guibas (1995, SIGGRAPH '95, 419) and the deterministic mixture of Owen & Zhou (2000, JASA 95,
  135); unbiased for ∫p when the q_r are normalised.
* Weighted summaries: `weighted_mean`, `weighted_sd`, `weighted_quantile` (definitions in each), and
  `mcse_weighted_mean`, the delta-method standard error of a self-normalised estimate (Owen 2013, ch. 9):
  Var ≈ Σ w̃_i² (f_i − μ̂)², w̃ = w/Σw.
* `log_evidence` — ln Z = ln Z_q + ln mean(w) for w = p̃/q̃ with ∫q̃ = Z_q, and its delta-method error
  σ(ln Z) = sd(w) / (√S · mean(w)).

Conventions: ``log_weights`` is 1-D (S,); −∞ entries are zero weights; NaN or +∞ raise ValueError. When
every weight is zero the diagnostics say so (`kish_ess` 0, `psis` k̂ = inf, `log_evidence` (−∞, inf)) and
the weighted summaries, which are then undefined, raise ValueError.
"""
from __future__ import annotations

import math

import numpy as np
from scipy.special import logsumexp

__all__ = [
    "normalised_weights",
    "kish_ess",
    "psis",
    "psis_khat",
    "PsisResult",
    "pareto_k_threshold",
    "gpd_fit",
    "defensive_log_density",
    "deterministic_mixture_log_weights",
    "weighted_mean",
    "weighted_sd",
    "weighted_quantile",
    "mcse_weighted_mean",
    "log_evidence",
    "weight_diagnostics",
]


def _log_weights(log_weights) -> np.ndarray:
    lw = np.asarray(log_weights, dtype=float)
    if lw.ndim != 1 or lw.size == 0:
        raise ValueError(f"log_weights must be a non-empty 1-D array, got shape {lw.shape}")
    if np.any(np.isnan(lw)) or np.any(lw == np.inf):
        raise ValueError("log_weights contain NaN or +inf")
    if not np.any(np.isfinite(lw)):
        raise ValueError("every weight is zero (all log_weights are -inf)")
    return lw


def _all_zero(log_weights) -> bool:
    lw = np.asarray(log_weights, dtype=float)
    return lw.ndim == 1 and lw.size > 0 and bool(np.all(lw == -np.inf))


def normalised_weights(log_weights) -> np.ndarray:
    """w̃_i = w_i / Σ w, computed stably from log weights."""
    lw = _log_weights(log_weights)
    return np.exp(lw - logsumexp(lw))


def kish_ess(log_weights) -> float:
    """Kish (1965) effective sample size (Σw)²/Σw² = 1/Σw̃²; S for equal weights, 1 for a single one,
    0 when every weight is zero."""
    if _all_zero(log_weights):
        return 0.0
    w = normalised_weights(log_weights)
    return float(1.0 / np.sum(w * w))


# ---------------------------------------------------------------------------
# Pareto smoothing
# ---------------------------------------------------------------------------


def psis_khat(log_weights) -> float:
    """The Pareto shape diagnostic k̂ of `psis` alone."""
    return psis(log_weights).k_hat


def pareto_k_threshold(S: int) -> float:
    """Largest reliable k̂ for S draws, min(1 − 1/log₁₀ S, 0.7) (Vehtari et al. 2024)."""
    if S <= 1:
        return -math.inf
    return min(1.0 - 1.0 / math.log10(S), 0.7)


def gpd_fit(x: np.ndarray) -> tuple[float, float]:
    """Shape k and scale σ of a generalised Pareto distribution fitted to exceedances x > 0 (sorted ascending).

    Zhang & Stephens (2009): the posterior mean of θ = −k/σ over m = 30 + ⌊√n⌋ grid points θ_j = 1/x_(n) +
    (1 − √(m/(j − ½))) / (3 x_(⌊n/4 + ½⌋)), weighted by the profile likelihood
    ℓ(θ) = n (ln(θ/k(θ)) − k(θ) − 1), k(θ) = −mean ln(1 − θ x); then k = −mean ln(1 − θ̂ x), σ = k/θ̂ (signs as
    in Vehtari et al., where k > 0 is a heavy tail), and the weakly informative prior of Vehtari et al.
    (2024, appendix) shrinks k towards 0.5 as if by 10 pseudo-observations: k ← (n k + 5)/(n + 10).
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    m = 30 + int(math.sqrt(n))
    j = np.arange(1, m + 1, dtype=float)
    theta = 1.0 / x[-1] + (1.0 - np.sqrt(m / (j - 0.5))) / (3.0 * x[int(n / 4 + 0.5) - 1])
    k = np.mean(np.log1p(-theta[:, None] * x[None, :]), axis=1)           # = −k(θ) in the sign above
    profile = n * (np.log(-theta / k) - k - 1.0)
    with np.errstate(over="ignore"):                                      # exp → inf gives weight 0, as meant
        weight = 1.0 / np.sum(np.exp(profile[None, :] - profile[:, None]), axis=1)
    keep = weight >= 10 * np.finfo(float).eps                              # drop negligible grid points
    weight, theta = weight[keep], theta[keep]
    theta_hat = np.sum(theta * weight / weight.sum())
    k_hat = float(np.mean(np.log1p(-theta_hat * x)))
    sigma = -k_hat / theta_hat
    k_hat = (n * k_hat + 10 * 0.5) / (n + 10)
    return k_hat, float(sigma)


class PsisResult(tuple):
    """(log_weights, k_hat, threshold, tail_length): smoothed log weights normalised to Σ exp = 1."""

    __slots__ = ()

    def __new__(cls, log_weights, k_hat, threshold, tail_length):
        return super().__new__(cls, (log_weights, k_hat, threshold, tail_length))

    log_weights = property(lambda self: self[0])
    k_hat = property(lambda self: self[1])
    threshold = property(lambda self: self[2])
    tail_length = property(lambda self: self[3])

    @property
    def reliable(self) -> bool:
        return bool(self.k_hat < self.threshold)


def psis(log_weights) -> PsisResult:
    """Pareto-smoothed importance sampling of one set of log weights (Vehtari et al. 2024).

    Returns `PsisResult`: the smoothed log weights (normalised, Σ exp = 1), k̂, the threshold
    `pareto_k_threshold` (S) and the tail length used. With 4 or fewer weights above the threshold
    (S ≲ 25) no fit is possible: k̂ = inf and the weights are returned unsmoothed (normalised); so too
    when every weight is zero (then the log weights are all −∞).
    """
    if _all_zero(log_weights):
        S = len(log_weights)
        return PsisResult(np.full(S, -np.inf), math.inf, pareto_k_threshold(S), 0)
    lw = _log_weights(log_weights).copy()
    S = lw.size
    lw -= lw.max()
    M = int(math.ceil(min(S / 5.0, 3.0 * math.sqrt(S))))
    order = np.argsort(lw)
    cut = max(lw[order[-M - 1]], math.log(np.finfo(float).tiny)) if M < S else math.log(np.finfo(float).tiny)
    tail = np.flatnonzero(lw > cut)
    k_hat = math.inf
    if tail.size > 4:
        tail = tail[np.argsort(lw[tail])]
        exceed = np.exp(lw[tail]) - math.exp(cut)
        k_hat, sigma = gpd_fit(exceed)
        if math.isfinite(k_hat) and sigma > 0:
            p = (np.arange(tail.size) + 0.5) / tail.size
            if abs(k_hat) < np.finfo(float).eps:
                q = -sigma * np.log1p(-p)
            else:
                q = sigma * np.expm1(-k_hat * np.log1p(-p)) / k_hat
            lw[tail] = np.minimum(np.log(q + math.exp(cut)), 0.0)         # capped at the largest raw weight
    lw -= logsumexp(lw)
    return PsisResult(lw, float(k_hat), pareto_k_threshold(S), int(tail.size))


# ---------------------------------------------------------------------------
# Proposals
# ---------------------------------------------------------------------------


def defensive_log_density(log_q1, log_q2, alpha: float) -> np.ndarray:
    """ln[(1 − α) q₁ + α q₂] from the two components' normalised log densities (Hesterberg 1995)."""
    if not 0.0 <= alpha <= 1.0:
        raise ValueError(f"defensive mixture: alpha must be in [0, 1], got {alpha!r}")
    a = np.asarray(log_q1, float)
    b = np.asarray(log_q2, float)
    if alpha == 0.0:
        return a + 0.0
    if alpha == 1.0:
        return b + 0.0
    return np.logaddexp(math.log1p(-alpha) + a, math.log(alpha) + b)


def deterministic_mixture_log_weights(log_p, log_q, n_per_round) -> np.ndarray:
    """ln w_i = ln p(x_i) − ln Σ_r (n_r/N) q_r(x_i) for draws pooled from R rounds.

    ``log_p`` (N,): target log density (any constant) at every pooled draw; ``log_q`` (R, N): every
    round's *normalised* proposal log density at every pooled draw (not only its own); ``n_per_round``
    (R,): draws made from each round, summing to N. The estimate (1/N) Σ w_i is unbiased for ∫p
    (Owen & Zhou 2000); self-normalised means are consistent. No draw is discarded.
    """
    lp = np.asarray(log_p, float)
    lq = np.atleast_2d(np.asarray(log_q, float))
    n = np.asarray(n_per_round, float)
    if lq.shape != (n.size, lp.size):
        raise ValueError(f"log_q must be (rounds, draws) = ({n.size}, {lp.size}), got {lq.shape}")
    if np.any(n < 0) or n.sum() != lp.size:
        raise ValueError(f"n_per_round must be ≥ 0 and sum to the {lp.size} draws, got {n.tolist()}")
    with np.errstate(divide="ignore"):
        log_frac = np.log(n / n.sum())
    return lp - logsumexp(lq + log_frac[:, None], axis=0)


# ---------------------------------------------------------------------------
# Weighted summaries
# ---------------------------------------------------------------------------


def _pair(x, log_weights):
    x = np.asarray(x, float)
    w = normalised_weights(log_weights)
    if x.shape[0] != w.size:
        raise ValueError(f"{x.shape[0]} values for {w.size} weights")
    return x, w


def weighted_mean(x, log_weights) -> np.ndarray:
    """Self-normalised estimate Σ w̃_i x_i (x shaped (S,) or (S, P))."""
    x, w = _pair(x, log_weights)
    return np.tensordot(w, x, axes=1)


def weighted_sd(x, log_weights) -> np.ndarray:
    """Weighted standard deviation sqrt(Σ w̃ (x − μ̂)² / (1 − Σ w̃²)).

    The factor 1/(1 − Σw̃²) is the usual small-sample correction for normalised ("reliability") weights:
    for equal weights it is n/(n − 1), giving the ordinary sample sd (ddof = 1); its effect is of order
    1/ESS.
    """
    x, w = _pair(x, log_weights)
    mu = np.tensordot(w, x, axes=1)
    var = np.tensordot(w, (x - mu) ** 2, axes=1)
    s2 = float(np.sum(w * w))
    return np.sqrt(var / (1.0 - s2)) if s2 < 1 else np.full(np.shape(mu), np.nan)


def weighted_quantile(x, log_weights, q) -> np.ndarray:
    """Quantiles q ∈ [0, 1] of 1-D values x under normalised weights w̃.

    Definition: the sorted values x_(i) are placed at the mid-points of their weight, F_i = Σ_{j<i} w̃_(j)
    + w̃_(i)/2, and the quantile function interpolates linearly between (F_i, x_(i)), constant beyond the
    first and last mid-point. For equal weights F_i = (i − ½)/n: Hazen's definition (type 5 of Hyndman &
    Fan 1996, Am. Stat. 50, 361; numpy method "hazen").
    """
    x, w = _pair(x, log_weights)
    if x.ndim != 1:
        raise ValueError("weighted_quantile takes 1-D values")
    qa = np.asarray(q, float)
    if np.any((qa < 0) | (qa > 1)) or np.any(np.isnan(qa)):
        raise ValueError(f"quantile levels must be in [0, 1], got {q!r}")
    order = np.argsort(x, kind="stable")
    xs, ws = x[order], w[order]
    F = np.cumsum(ws) - 0.5 * ws
    return np.interp(qa, F, xs)


def mcse_weighted_mean(x, log_weights) -> np.ndarray:
    """Monte Carlo standard error of `weighted_mean`: sqrt(Σ w̃_i² (x_i − μ̂)²) (delta method, Owen 2013, ch. 9).

    Valid for independent draws from the proposal (thin correlated draws first) and finite weight
    variance (check k̂ from `psis`).
    """
    x, w = _pair(x, log_weights)
    mu = np.tensordot(w, x, axes=1)
    return np.sqrt(np.tensordot(w * w, (x - mu) ** 2, axes=1))


# ---------------------------------------------------------------------------
# Evidence and one-call diagnostics
# ---------------------------------------------------------------------------


def log_evidence(log_weights, log_zq: float = 0.0) -> tuple[float, float]:
    """(ln Z, σ(ln Z)) from S draws of a proposal: Z = Z_q · mean(w), w_i = p̃(x_i)/q̃(x_i).

    ``log_weights``: ln p̃ − ln q̃ at the draws, with p̃ the unnormalised target (its integral Z is what is
    estimated) and q̃ the proposal density with ∫q̃ = Z_q = exp(``log_zq``) (0 for a normalised proposal);
    −∞ entries (draws outside the target's support) count as zero weights. σ(ln Z) = sd(w)/(√S mean(w))
    with the sample sd (ddof = 1): the delta method for the logarithm of a mean of i.i.d. weights.
    """
    if _all_zero(log_weights):
        return -math.inf, math.inf
    lw = _log_weights(log_weights)
    S = lw.size
    log_mean = float(logsumexp(lw) - math.log(S))
    r = np.exp(lw - log_mean)                                    # w / mean(w)
    err = math.sqrt(np.sum((r - 1.0) ** 2) / (S - 1) / S) if S > 1 else math.inf
    return float(log_zq) + log_mean, err


def weight_diagnostics(log_weights) -> dict:
    """Kish ESS, its fraction of S, PSIS k̂ and threshold, and the largest normalised weight."""
    lw = _log_weights(log_weights)
    res = psis(lw)
    ess = kish_ess(lw)
    return {"draws": int(lw.size), "kish_ess": ess, "ess_fraction": ess / lw.size, "pareto_k": res.k_hat,
            "pareto_k_threshold": res.threshold, "reliable": res.reliable,
            "max_weight": float(normalised_weights(lw).max())}
