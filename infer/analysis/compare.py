"""Comparison of runs: the parameters they share, the shift between them, and Bayes factors.

* Parameter sets. Runs are compared on the same quantities: when their sampled parameters differ the
  comparison is refused (`common_parameters`, one line naming what differs) unless the caller names the
  quantities to compare, each of which every run must hold (sampled or derived).
* Shift. For each pair of runs the parameter-difference posterior of Raveri & Hu 2019 (PRD 99, 043506)
  with its Gaussian approximation (`infer.analysis.shift.parameter_shift`), on the compared quantities.
  It assumes the two runs' data are independent (`shift.CAVEAT`): runs on the same data set, or on data
  sets that share noise (overlapping sky, the same maps), are correlated and the significance is then
  misstated: shared noise moves both runs together, the true covariance of the difference is
  C_A + C_B − 2 C_AB, smaller than the assumed C_A + C_B, so a real shift is usually understated; for two
  runs on one data set (which differ by Monte Carlo noise alone) it is meaningless as a tension.
  `PairShift.same_data` flags the second case.
  Quantities whose draws are degenerate (constant, or a linear function of the others such as a
  derived sum with its terms: condition number of their correlation matrix above `MAX_CONDITION`)
  are refused, since the difference covariance is then singular.
* Bayes factors. Where both runs carry an evidence estimate (the surrogate engine's ln Z, from the
  importance weights, `infer.analysis.weights.log_evidence`) and fit the same data, ln B = ln Z_A − ln Z_B
  with error √(σ_A² + σ_B²) (independent estimates). Evidences of different data are not comparable,
  and ln B carries the prior volumes of both runs: widening a prior of a parameter the data constrain
  lowers ln Z by about the log of the widening factor. The verbal scale is that of Kass & Raftery 1995
  (JASA 90, 773, their table on 2 ln B; from memory): |ln B| < 1 not worth more than a bare mention,
  1–3 positive, 3–5 strong, > 5 very strong.

Pure NumPy on the draws and plain records; nothing here reads or writes files.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from itertools import combinations

import numpy as np

from infer.analysis.samples import Samples
from infer.analysis.shift import CAVEAT, ShiftResult, parameter_shift
from infer.analysis.weighted import WeightedSample
from infer.errors import UserError

__all__ = ["common_parameters", "draws_of", "PairShift", "pair_shifts", "BayesFactor", "bayes_factors",
           "evidence_words", "CAVEAT"]


def common_parameters(runs, params=None) -> list[str]:
    """The quantities to compare. ``runs``: list of (label, sampled names, all names). Without ``params``
    the runs must share their sampled parameters (returned in the first run's order); with it every run
    must hold every named quantity. A `UserError` names what differs."""
    if len(runs) < 2:
        raise UserError(f"compare: give at least two chains, got {len(runs)}")
    if params is not None:
        params = [p for p in params]
        if not params:
            raise UserError("--params: no quantity named")
        dup = sorted({p for p in params if params.count(p) > 1})
        if dup:
            raise UserError(f"--params: {', '.join(dup)} named twice")
        lacking = [f"{lab} lacks {', '.join(p for p in params if p not in set(alln))}"
                   for lab, _, alln in runs if any(p not in set(alln) for p in params)]
        if lacking:
            raise UserError(f"--params: {'; '.join(lacking)}")
        return params
    first = list(runs[0][1])
    union = set().union(*(set(s) for _, s, _ in runs))
    differ = [p for p in first if any(p not in set(s) for _, s, _ in runs)] + \
             sorted(union - set(first))
    if differ:
        where = "; ".join(f"{lab} lacks {', '.join(p for p in differ if p not in set(s))}"
                          for lab, s, _ in runs if any(p not in set(s) for p in differ))
        raise UserError(f"chains of different parameter sets compared: {', '.join(differ)} not in every chain "
                        f"({where}); pass --params with quantities every chain holds")
    return first


def draws_of(sample: Samples | WeightedSample, names) -> tuple[np.ndarray, np.ndarray | None]:
    """(draws shaped (n, len(names)), normalised weights or None) of the kept draws of ``sample`` (a
    `Samples` after burn-in, pooled over steps, ensembles and walkers, or a `WeightedSample`); draws with a
    non-finite value or zero weight are left out."""
    x = np.column_stack([np.asarray(sample.column(n), float).ravel() for n in names])
    ok = np.all(np.isfinite(x), axis=1)
    w = None
    if isinstance(sample, WeightedSample):
        w = sample.weights
        ok &= w > 0
        w = w[ok] / w[ok].sum()
    return x[ok], w


#: Largest condition number of the draws' correlation matrix for which the shift is computed.
MAX_CONDITION = 1e8


def _check_independent(label, x, names) -> None:
    """Refuse quantities whose draws are (numerically) constant or linear functions of each other: the
    difference covariance is then singular and the shift meaningless."""
    if len(names) < 2:
        if not np.ptp(x[:, 0]) > 0:
            raise UserError(f"compare: {names[0]} is constant in {label}; no shift can be measured")
        return
    sd = x.std(axis=0)
    if not np.all(sd > 0) or np.linalg.cond(np.corrcoef(x.T)) > MAX_CONDITION:
        raise UserError(f"compare: the draws of {', '.join(names)} in {label} are degenerate (a quantity is "
                        "constant or a function of the others, e.g. a derived sum with its terms); choose "
                        "others with --params")


@dataclass(frozen=True)
class PairShift:
    a: str                       # labels of the two runs (difference = a − b)
    b: str
    result: ShiftResult
    same_data: bool              # both runs fit the same data: the shift is Monte Carlo noise only


def pair_shifts(runs, names, *, pairs: int = 16000, seed: int = 0) -> list[PairShift]:
    """`parameter_shift` for every pair of ``runs`` (list of (label, sample, data id)) on ``names``."""
    out = []
    for (la, sa, da), (lb, sb, db) in combinations(runs, 2):
        xa, wa = draws_of(sa, names)
        xb, wb = draws_of(sb, names)
        for lab, x in ((la, xa), (lb, xb)):
            _check_independent(lab, x, names)
        try:
            r = parameter_shift(xa, xb, wa, wb, names=tuple(names), pairs=pairs, seed=seed)
        except np.linalg.LinAlgError:
            raise UserError(f"compare: the draws of {', '.join(names)} are degenerate (a quantity is constant or "
                            "a function of the others, e.g. a derived sum); choose others with --params") from None
        out.append(PairShift(la, lb, r, da is not None and da == db))
    return out


@dataclass(frozen=True)
class BayesFactor:
    a: str
    b: str
    ln_b: float                  # ln Z_a − ln Z_b (nan when not available)
    error: float
    reason: str = ""             # why there is no number, when there is none


def evidence_words(ln_b: float) -> str:
    """Kass & Raftery's (1995) words for |ln B| (module docstring), naming the favoured side."""
    m = abs(ln_b)
    words = ("not worth more than a bare mention" if m < 1 else "positive" if m < 3 else
             "strong" if m < 5 else "very strong")
    return words


def bayes_factors(runs) -> list[BayesFactor]:
    """ln B for every pair of ``runs``, a list of (label, (ln Z, error) or None, data id)."""
    out = []
    for (la, za, da), (lb, zb, db) in combinations(runs, 2):
        if za is None or zb is None:
            lack = [lab for lab, z in ((la, za), (lb, zb)) if z is None]
            out.append(BayesFactor(la, lb, math.nan, math.nan,
                                   f"no evidence estimate in {' and '.join(lack)} (ensemble chains carry none; "
                                   "the surrogate engine records ln Z)"))
        elif da is None or da != db:
            out.append(BayesFactor(la, lb, math.nan, math.nan,
                                   "the runs fit different data, whose evidences are not comparable"))
        else:
            out.append(BayesFactor(la, lb, za[0] - zb[0], math.hypot(za[1], zb[1])))
    return out
