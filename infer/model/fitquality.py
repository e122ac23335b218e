"""Fit quality of a model against band powers: χ² and PTE in all, per spectrum kind and per frequency pair.

χ² = rᵀ C⁻¹ r with r = d − m. A block (the bands of one kind, or of one kind and channel pair) gets its own
χ² with its own covariance block, r_Bᵀ (C_BB)⁻¹ r_B, and a PTE from the χ² survival function for the
block's band count (scipy.stats.chi2). The total's PTE uses N − P degrees of freedom. Blocks share the
fitted parameters, so block PTEs are indicative only: a block's χ² is not exactly χ²-distributed with
N_B dof and the blocks are not independent of each other (common practice in reporting per-spectrum fits).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import linalg, stats


@dataclass(frozen=True)
class FitQuality:
    """χ² of a model against the data: total, per spectrum kind and per (kind, pair) block (each with its own
    covariance block), the degrees of freedom after ``n_params`` fitted parameters, and the PTE.

    ``by_kind``: kind → (χ², bands); ``by_pair``: "TT 90x150" (just "TT" for a single-channel dataset) →
    (χ², bands); `block_pte` gives a block's indicative PTE."""

    chi2: float
    n_bins: int
    dof: int
    pte: float
    by_kind: dict
    by_pair: dict = field(default_factory=dict)

    @staticmethod
    def block_pte(block: tuple[float, int]) -> float:
        """Indicative PTE of a (χ², bands) block for its band count (scipy.stats.chi2)."""
        return pte(block[0], block[1])


def pte(chi2: float, dof: int) -> float:
    """Probability to exceed χ² for ``dof`` degrees of freedom (scipy.stats.chi2 survival function)."""
    return float(stats.chi2.sf(chi2, dof)) if dof > 0 else float("nan")


def pair_labels(data) -> np.ndarray:
    """(N,) block label of each band: "KIND PAIR", or "KIND" where the pair label is empty."""
    kind = np.asarray(data.kind).astype(str)
    pair = np.asarray(getattr(data, "pair", np.full(kind.shape, ""))).astype(str)
    return np.array([f"{k} {p}" if p else k for k, p in zip(kind, pair)])


def _blocks(labels: np.ndarray) -> dict[str, np.ndarray]:
    return {lab: np.flatnonzero(labels == lab) for lab in dict.fromkeys(labels.tolist())}


def block_chi2(residual: np.ndarray, covariance: np.ndarray, labels: np.ndarray) -> dict[str, tuple[float, int]]:
    """label → (r_Bᵀ C_BB⁻¹ r_B, bands) for each block of equal ``labels``, in first-appearance order."""
    out = {}
    for lab, rows in _blocks(np.asarray(labels)).items():
        c = linalg.cholesky(covariance[np.ix_(rows, rows)], lower=True)
        z = linalg.solve_triangular(c, residual[rows], lower=True)
        out[lab] = (float(z @ z), int(rows.size))
    return out


def fit_quality(data, model: np.ndarray, chi2: float, n_params: int) -> FitQuality:
    """The `FitQuality` of ``model`` (N,) against ``data`` given its total ``chi2`` (the likelihood's own)."""
    r = np.asarray(data.value, float) - np.asarray(model, float)
    cov = np.asarray(data.covariance, float)
    by_kind = block_chi2(r, cov, np.asarray(data.kind).astype(str))
    by_pair = block_chi2(r, cov, pair_labels(data))
    n = int(r.size)
    dof = n - int(n_params)
    return FitQuality(float(chi2), n, dof, pte(chi2, dof), by_kind, by_pair)


__all__ = ["FitQuality", "block_chi2", "fit_quality", "pair_labels", "pte"]
