"""Convergence diagnostics for MCMC draws: R̂, effective sample size, autocorrelation time.

Pure NumPy/SciPy functions on arrays; nothing here knows about chain files or configs.

Methods implemented
-------------------
* Rank-normalised split-R̂, bulk ESS and tail ESS:
  A. Vehtari, A. Gelman, D. Simpson, B. Carpenter & P.-C. Bürkner (2021),
  "Rank-normalization, folding, and localization: an improved R̂ for assessing
  convergence of MCMC", Bayesian Analysis 16, 667.
  Draws are split in half in time, pooled, replaced by their normal scores
  (ranks with Blom's 3/8 offset pushed through the normal quantile function), and
  the between/within variance ratio of Gelman & Rubin (1992, Statistical Science
  7, 457) is taken
  for the bulk and for the draws folded about the median (tail); R̂ is the larger.
  ESS uses the FFT autocovariance of every chain, the multi-chain combination of
  the paper and Geyer's (1992, Statistical Science 7, 473) initial
  positive sequence followed by the initial monotone sequence. Tail ESS is the
  smaller ESS of the indicators of the 5% and 95% quantiles.
* Integrated autocorrelation time of an ensemble:
  J. Goodman & J. Weare (2010), Comm. App. Math. Comp. Sci. 5, 65, and
  D. Foreman-Mackey, D. W. Hogg, D. Lang & J. Goodman (2013), PASP 125, 306:
  the normalised autocorrelation function is averaged over walkers before it is
  summed; the sum is truncated with the automatic window of A. D. Sokal (1997),
  "Monte Carlo methods in statistical mechanics: foundations and new
  algorithms" (lecture notes, Cargèse 1996): the smallest M with M >= c·τ(M).

Conventions
-----------
Every ``draws`` argument is a 2-D array shaped ``(chains, draws)``; a 1-D array is
one chain. Non-finite input or too few draws (< 4) gives ``nan``. When every chain
is constant, R̂ and ESS are undefined and ``nan`` is returned (R̂ is ``inf`` when
the constant chains disagree); τ is ``nan`` as soon as any one chain is constant,
because its autocorrelation function is undefined. No warnings are emitted.
Nothing here raises because a chain is short; reliability is a separate question
answered by :func:`autocorr_reliable`.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import fft, special

__all__ = [
    "split_rhat",
    "ess_bulk",
    "ess_tail",
    "autocorr_time",
    "autocorr_reliable",
    "ess_autocorr",
    "acceptance_fraction",
    "all_diagnostics",
    "burn_in",
]

_MIN_DRAWS = 4  # fewer draws than this cannot be split and paired meaningfully
_TAIL_PROBS = (0.05, 0.95)  # quantiles whose indicators define tail ESS (Vehtari et al. 2021)
_FFT_BLOCK = 1 << 22  # max. number of padded values transformed at once, bounds memory


# ---------------------------------------------------------------------------
# Input handling and elementary transforms
# ---------------------------------------------------------------------------


def _as_chains(draws) -> np.ndarray:
    """Return ``draws`` as a float64 array shaped (chains, draws)."""
    x = np.asarray(draws, dtype=float)
    if x.ndim == 1:
        x = x[np.newaxis, :]
    if x.ndim != 2:
        raise ValueError(f"draws must be shaped (chains, draws), got shape {x.shape}")
    return x


def _usable(x: np.ndarray) -> bool:
    """True when (chains, draws) array ``x`` has enough draws and only finite values."""
    return x.shape[0] >= 1 and x.shape[1] >= _MIN_DRAWS and bool(np.all(np.isfinite(x)))


def _split(x: np.ndarray) -> np.ndarray:
    """(chains, n) → (2·chains, n // 2): first and last halves; a middle draw is dropped."""
    half = x.shape[1] // 2
    return np.concatenate((x[:, :half], x[:, x.shape[1] - half :]), axis=0)


def _average_ranks(values: np.ndarray) -> np.ndarray:
    """1-based ranks of 1-D ``values``, ties sharing their mean rank.

    Same result as ``scipy.stats.rankdata(values, method="average")``; an unstable
    argsort is enough because tied values receive the mean rank of their group,
    which makes it a few times faster on the millions of draws of a long run.
    """
    order = np.argsort(values)
    ordered = values[order]
    first = np.empty(values.size, dtype=bool)  # True where a new distinct value starts
    first[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=first[1:])
    bounds = np.append(np.flatnonzero(first), values.size)
    mean_rank = 0.5 * (bounds[:-1] + bounds[1:] + 1)  # mean of ranks start+1 … next start
    ranks = np.empty(values.size)
    ranks[order] = mean_rank[np.cumsum(first) - 1]
    return ranks


def _normal_scores(x: np.ndarray) -> np.ndarray:
    """Rank-normalise all values of ``x`` jointly (Vehtari et al. 2021).

    Average ranks r of the pooled S values are mapped to Φ⁻¹((r − 3/8) / (S + 1/4)),
    Blom's (1958) offset. Same shape as ``x``.
    """
    ranks = _average_ranks(x.ravel()).reshape(x.shape)
    return special.ndtri((ranks - 0.375) / (x.size + 0.25))


def _mean_autocovariance(x: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
    """Chain-averaged biased autocovariance by FFT.

    For ``x`` shaped (chains, n) returns, for lags t = 0 … n−1,
    ``(1/chains) Σ_k w_k · (1/n) Σ_s x̃_k,s x̃_k,s+t`` with x̃ the chain-centred draws and
    w_k = ``weights[k]`` (default 1). Linear in the power spectrum, so the spectra of
    blocks of chains are summed before one inverse transform; memory stays bounded
    for thousands of walkers.
    """
    n_chains, n = x.shape
    m = fft.next_fast_len(2 * n, real=True)  # zero padding ≥ n: no circular wrap
    block = max(1, _FFT_BLOCK // m)
    spectrum = np.zeros(m // 2 + 1)
    for start in range(0, n_chains, block):
        part = x[start : start + block]
        part = part - part.mean(axis=1, keepdims=True)
        f = fft.rfft(part, n=m, axis=1)
        power = f.real**2 + f.imag**2
        if weights is not None:
            power *= weights[start : start + block, np.newaxis]
        spectrum += power.sum(axis=0)
    return fft.irfft(spectrum, n=m)[:n] / (n * n_chains)


# ---------------------------------------------------------------------------
# R̂
# ---------------------------------------------------------------------------


def _rhat_basic(x: np.ndarray) -> float:
    """Gelman–Rubin potential scale reduction of (chains, n) ``x`` (as in Vehtari et al. 2021).

    R̂ = sqrt(((n − 1)/n · W + B/n) / W), B = n · Var(chain means), W = mean chain variance.
    If every chain is constant (W = 0) the result is ``nan`` when B = 0 too, else ``inf``.
    """
    n = x.shape[1]
    between = n * np.var(x.mean(axis=1), ddof=1)
    moving = np.ptp(x, axis=1) > 0.0  # exact zero for constant chains, free of round-off
    if not moving.any():
        return math.nan if between == 0.0 else math.inf
    within = np.mean(np.where(moving, np.var(x, axis=1, ddof=1), 0.0))
    return float(np.sqrt((between / within + n - 1.0) / n))


def split_rhat(draws) -> float:
    """Rank-normalised split-R̂ (Vehtari et al. 2021, Bayesian Analysis 16, 667).

    Parameters
    ----------
    draws : array_like, shape (chains, draws)
        Draws of one scalar quantity. Each chain is split in half in time (a middle
        draw is dropped when the length is odd), so a single chain still tests
        stationarity of its first against its second half.

    Returns
    -------
    float
        max(bulk R̂, tail R̂): bulk from the pooled normal scores of the split
        chains, tail from the normal scores of the split draws folded about their
        pooled median. ``nan`` for fewer than 4 draws, non-finite input or a
        constant sequence; ``inf`` when all chains are constant but disagree.
        Agrees with ``arviz.rhat(draws, method="rank")`` for two or more chains
        (ArviZ returns ``nan`` for a single chain).
    """
    x = _as_chains(draws)
    if not _usable(x):
        return math.nan
    x = _split(x)
    bulk = _rhat_basic(_normal_scores(x))
    tail = _rhat_basic(_normal_scores(np.abs(x - np.median(x))))
    if math.isnan(bulk) or math.isnan(tail):
        return math.nan
    return max(bulk, tail)


# ---------------------------------------------------------------------------
# Effective sample size
# ---------------------------------------------------------------------------


def _ess(x: np.ndarray) -> float:
    """Multi-chain ESS of (chains, n) ``x`` (Vehtari et al. 2021).

    ρ̂_t = 1 − (W − mean_k acov_k(t)) / var⁺ with W the mean within-chain variance and
    var⁺ = (n−1)/n · W + Var(chain means). Lags are paired, P_k = ρ̂_2k + ρ̂_2k+1,
    the sum stops before the first non-positive pair (Geyer's initial positive
    sequence) and the pairs kept are replaced by their running minimum (initial
    monotone sequence). τ̂ = −1 + 2 Σ P_k + ρ̂ of the first dropped even lag when
    positive, bounded below by 1/log10(chains·n); ESS = chains·n / τ̂. The bookkeeping
    follows the paper's reference implementation (also ArviZ 0.23) lag for lag,
    except that ``nan`` (not chains·n) is returned when every chain is constant.
    """
    n_chains, n = x.shape
    if n < 4:  # split halves of fewer than 4 draws leave no lag pair to sum
        return math.nan
    if np.all(np.ptp(x, axis=1) == 0.0):  # no within-chain variation: ESS undefined
        return math.nan
    acov = _mean_autocovariance(x)
    mean_var = acov[0] * n / (n - 1.0)  # W, the unbiased within-chain variance
    var_plus = mean_var * (n - 1.0) / n
    if n_chains > 1:
        var_plus += np.var(x.mean(axis=1), ddof=1)

    n_pairs = (n - 3) // 2 + 1  # pairs (2k, 2k+1) reachable with lags ≤ n − 2
    rho = 1.0 - (mean_var - acov[: 2 * n_pairs]) / var_plus
    rho[0] = 1.0
    pair_sums = rho[0::2] + rho[1::2]

    non_positive = np.flatnonzero(pair_sums <= 0.0)
    if non_positive.size:
        stop = int(non_positive[0])  # first pair not kept
        even = rho[2 * stop]
        last = even if (even > 0.0 or pair_sums[stop] == 0.0) else 0.0
    else:
        stop = n_pairs - 1
        last = rho[2 * stop]
    kept = np.minimum.accumulate(pair_sums[:stop])

    total = n_chains * n
    tau = -1.0 + 2.0 * kept.sum() + last
    tau = max(tau, 1.0 / math.log10(total))
    ess = total / tau
    return float(ess) if math.isfinite(ess) else math.nan


def ess_bulk(draws) -> float:
    """Bulk effective sample size (Vehtari et al. 2021, Bayesian Analysis 16, 667).

    Parameters
    ----------
    draws : array_like, shape (chains, draws)

    Returns
    -------
    float
        ESS of the pooled normal scores of the split chains; ``nan`` for fewer than
        8 draws per chain (split halves shorter than 4), non-finite input or when every chain is constant. Agrees with
        ``arviz.ess(draws, method="bulk")`` (which returns the draw count, not
        ``nan``, for a constant sequence, and a small number when all chains are
        constant at different values).
    """
    x = _as_chains(draws)
    if not _usable(x):
        return math.nan
    return _ess(_normal_scores(_split(x)))


def ess_tail(draws) -> float:
    """Tail effective sample size (Vehtari et al. 2021, Bayesian Analysis 16, 667).

    Parameters
    ----------
    draws : array_like, shape (chains, draws)

    Returns
    -------
    float
        min over q ∈ {5%, 95%} of the ESS of the split indicator I(θ ≤ θ_q), θ_q
        the pooled sample quantile (linear interpolation, Hyndman & Fan type 7).
        ``nan`` for fewer than 8 draws per chain, non-finite input or an indicator that is
        constant within every split chain (heavy ties; every chain constant).
        Agrees with ``arviz.ess(draws, method="tail")``.
    """
    x = _as_chains(draws)
    if not _usable(x):
        return math.nan
    quantiles = np.quantile(x, _TAIL_PROBS)
    values = [_ess(_split((x <= q).astype(float))) for q in quantiles]
    return math.nan if any(math.isnan(v) for v in values) else min(values)


# ---------------------------------------------------------------------------
# Integrated autocorrelation time of an ensemble
# ---------------------------------------------------------------------------


def autocorr_time(draws, c: float = 5.0) -> float:
    """Integrated autocorrelation time τ of an ensemble (Goodman & Weare 2010; Sokal 1997).

    Parameters
    ----------
    draws : array_like, shape (chains, draws)
        Usually one row per walker of an ensemble sampler.
    c : float
        Window constant of Sokal's automatic window.

    Returns
    -------
    float
        τ(M) = 1 + 2 Σ_{t=1..M} ρ̄(t), where ρ̄ is the normalised autocorrelation
        function averaged over chains (Foreman-Mackey et al. 2013) and M is the
        smallest lag with M ≥ c·τ(M) (the last lag if none). Equal to
        ``emcee.autocorr.integrated_time(draws.T, c=c, tol=0)``. Never raises for
        a short chain: judge the estimate with :func:`autocorr_reliable`.
        ``nan`` for non-finite input, fewer than 4 draws, or any constant chain
        (its autocorrelation is undefined).
    """
    x = _as_chains(draws)
    if not _usable(x) or np.any(np.ptp(x, axis=1) == 0.0):
        return math.nan
    variances = np.var(x, axis=1)
    rho = _mean_autocovariance(x, weights=1.0 / variances)
    taus = 2.0 * np.cumsum(rho) - 1.0
    inside = np.arange(taus.size) < c * taus
    # For chain-centred draws Σ_t ρ̄(t) over all lags is exactly 1/2, so τ(n−1) = 0
    # and the window always closes; the fallback only guards against round-off.
    window = int(np.argmin(inside)) if not inside.all() else taus.size - 1
    return float(taus[window])


def autocorr_reliable(draws, tau: float, factor: float = 50) -> bool:
    """Whether τ from :func:`autocorr_time` can be trusted: draws ≥ factor·τ.

    ``factor`` = 50 is the customary threshold for ensemble samplers (common
    practice; Foreman-Mackey et al. 2013 and its software documentation). A
    non-finite τ is never reliable. ``draws`` is shaped (chains, draws).
    """
    n = _as_chains(draws).shape[1]
    return bool(math.isfinite(tau) and n >= factor * tau)


def ess_autocorr(draws) -> float:
    """Effective sample size chains·draws / τ with τ from :func:`autocorr_time`.

    ``draws`` is shaped (chains, draws); ``nan`` whenever τ is.
    """
    x = _as_chains(draws)
    tau = autocorr_time(x)
    return x.size / tau if math.isfinite(tau) and tau > 0.0 else math.nan


# ---------------------------------------------------------------------------
# Sampler bookkeeping
# ---------------------------------------------------------------------------


def acceptance_fraction(positions) -> np.ndarray:
    """Per-walker fraction of steps whose position differs from the previous step.

    Parameters
    ----------
    positions : array_like, shape (steps, walkers, params)

    Returns
    -------
    ndarray, shape (walkers,)
        Fraction of the steps - 1 transitions t-1 → t in which any parameter
        changed (an accepted proposal identical to the old point, probability
        zero for continuous proposals, counts as rejected). ``nan`` when there are
        fewer than two steps.
    """
    p = np.asarray(positions)
    if p.ndim != 3:
        raise ValueError(f"positions must be shaped (steps, walkers, params), got shape {p.shape}")
    if p.shape[0] < 2:
        return np.full(p.shape[1], np.nan)
    moved = np.any(p[1:] != p[:-1], axis=2)
    return moved.mean(axis=0)


def burn_in(tau_max: float, steps: int, factor: float = 5.0) -> int:
    """Number of initial steps to discard: the arithmetic of the burn-in rule.

    Which τ_max and which factor the run uses is decided in one place, `infer.analysis.burnin`
    (``BURN_FACTOR``, τ over every sampled and derived quantity); call it through `burnin.choose`.
    Rule: ceil(factor · τ_max) steps, never more than half the chain
    (steps // 2); a non-finite τ_max (no usable estimate) discards half the
    chain. A few τ of burn-in is common practice for ensemble samplers
    (Foreman-Mackey et al. 2013); the cap keeps a usable second half.
    """
    steps = int(steps)
    if steps < 0:
        raise ValueError(f"steps must be non-negative, got {steps}")
    if not factor > 0:
        raise ValueError(f"factor must be positive, got {factor}")
    half = steps // 2
    if not math.isfinite(tau_max):
        return half
    return min(half, max(0, math.ceil(factor * tau_max)))


def all_diagnostics(samples, names) -> dict[str, dict[str, float]]:
    """R̂, bulk and tail ESS and τ for every parameter of a set of ensembles.

    Parameters
    ----------
    samples : array_like, shape (steps, ensembles, walkers, params)
        Positions of every walker of every independent ensemble.
    names : sequence of str, length params

    Returns
    -------
    dict
        ``{name: {"rhat": float, "ess_bulk": float, "ess_tail": float, "tau": float}}``.

    Notes
    -----
    Convention of this project:

    * **R̂** uses the independent *ensembles* as chains. The walkers of one
      ensemble move using each other's positions, so they are not independent
      chains and are never used as separate chains for R̂. The draws of ensemble
      e are its walkers' positions flattened step-major, (steps · walkers) values
      ``samples[0, e, 0], samples[0, e, 1], …, samples[1, e, 0], …``, and split-R̂
      splits each ensemble in time (first half of the steps against the second).
      With a single ensemble R̂ only tests stationarity.
    * **Bulk/tail ESS and τ** treat every walker's trajectory as a sequence:
      chains = all walkers of all ensembles, shaped (ensembles · walkers, steps),
      i.e. the walker-averaged autocorrelation estimator recommended for ensemble
      samplers (Goodman & Weare 2010; Foreman-Mackey et al. 2013). This assumes
      that walker trajectories decorrelate from one another; the between-ensemble
      R̂ is the guard against that assumption failing.
    """
    s = np.asarray(samples, dtype=float)
    if s.ndim != 4:
        raise ValueError(
            f"samples must be shaped (steps, ensembles, walkers, params), got shape {s.shape}"
        )
    names = list(names)
    steps, n_ens, n_walk, n_par = s.shape
    if len(names) != n_par:
        raise ValueError(f"{len(names)} names given for {n_par} parameters")
    if len(set(names)) != len(names):
        raise ValueError("parameter names must be unique")

    result = {}
    for p, name in enumerate(names):
        values = s[..., p]  # (steps, ensembles, walkers)
        per_ensemble = values.transpose(1, 0, 2).reshape(n_ens, steps * n_walk)
        per_walker = values.reshape(steps, n_ens * n_walk).T
        result[name] = {
            "rhat": split_rhat(per_ensemble),
            "ess_bulk": ess_bulk(per_walker),
            "ess_tail": ess_tail(per_walker),
            "tau": autocorr_time(per_walker),
        }
    return result
