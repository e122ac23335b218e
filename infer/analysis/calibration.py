"""Simulation-based calibration statistics (Talts, Betancourt, Simpson, Vehtari & Gelman 2018,
arXiv:1804.06788), as pure functions: the weighted posterior CDF at the truth (uniform under calibration),
central-interval coverage with binomial errors, rank histograms, their binomial band and the χ² test of
flatness (scipy.stats.chisquare). Used by `infer.forecast.calibrate`."""
from __future__ import annotations

from dataclasses import dataclass
import numpy as np
from scipy import stats
from infer.errors import UserError
#: Central-interval masses whose coverage is reported.
LEVELS = (0.68, 0.95)


def weighted_rank(draws, weights, truth) -> np.ndarray:
    """u_j = weighted fraction of the draws below truth_j (ties count half), per parameter (P,)."""
    draws, w = np.atleast_2d(np.asarray(draws, float)), np.asarray(weights, float)
    w = w / w.sum()
    below = (draws < truth[None, :]).astype(float) + 0.5 * (draws == truth[None, :])
    return w @ below


def inside(u, level: float) -> np.ndarray:
    """Whether the central interval of mass ``level`` of the (weighted) CDF holds the truth: |u − ½| < level/2."""
    return np.abs(np.asarray(u, float) - 0.5) < 0.5 * level


def histogram(u, bins: int) -> np.ndarray:
    """Counts of u in ``bins`` equal bins of [0, 1], per parameter: (bins, P)."""
    u = np.atleast_2d(np.asarray(u, float).T).T
    k = np.clip((u * bins).astype(int), 0, bins - 1)
    return np.stack([np.bincount(k[:, j], minlength=bins) for j in range(u.shape[1])], axis=1)


def binomial_band(n: int, bins: int, mass: float = 0.99) -> tuple[float, float]:
    """Central ``mass`` interval of one bin's count under calibration, Binomial(n, 1/bins)."""
    lo, hi = stats.binom.interval(mass, n, 1.0 / bins)
    return float(lo), float(hi)


@dataclass(frozen=True)
class Verdict:
    """Per parameter: coverage and its binomial error at each level, the rank χ² and its p-value."""
    names: tuple
    n: int
    bins: int
    coverage: np.ndarray          # (levels, P)
    error: np.ndarray             # (levels, P), [p̂(1 − p̂)/N]^½
    pull: np.ndarray              # (levels, P), (p̂ − p) / [p(1 − p)/N]^½
    counts: np.ndarray            # (bins, P)
    chi2: np.ndarray              # (P,)
    p_value: np.ndarray           # (P,)


def assess(u, names, bins: int) -> Verdict:
    """Coverage, rank histograms and the χ² test of flatness of the ranks ``u`` (N, P)."""
    u = np.asarray(u, float)
    n = len(u)
    if n < 1:
        raise UserError("no finished mock to assess")
    levels = np.array(LEVELS)[:, None]
    cov = np.stack([inside(u, lv).mean(axis=0) for lv in LEVELS])
    err = np.sqrt(cov * (1 - cov) / n)
    pull = (cov - levels) / np.sqrt(levels * (1 - levels) / n)
    counts = histogram(u, bins)
    test = stats.chisquare(counts, axis=0)
    return Verdict(tuple(names), n, bins, cov, err, pull, counts, np.asarray(test.statistic, float),
                   np.asarray(test.pvalue, float))


def default_bins(n: int) -> int:
    """Rank-histogram bins: about 20 mocks per bin, 2–20 (our choice: comfortably above the ≥ 5 expected counts
    per bin that Pearson's χ² needs, a rule of thumb of common practice)."""
    return int(np.clip(n // 20, 2, 20))


