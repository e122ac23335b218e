"""Fit quality per spectrum and per frequency pair (infer.model.fitquality).

References: χ² = rᵀC⁻¹r of each block with its own covariance block, checked against
scipy.stats.multivariate_normal (its log-density at r is −½χ² − ½ ln det 2πC); PTE from scipy.stats.chi2.
"""
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats

from infer.model.fitquality import fit_quality, pair_labels


def _data(rng):
    kind = np.array(["TT"] * 6 + ["EE"] * 4)
    pair = np.array(["90x90"] * 3 + ["90x150"] * 3 + ["150x150"] * 4)
    a = rng.normal(size=(10, 10))
    cov = a @ a.T + 10 * np.eye(10)
    return SimpleNamespace(kind=kind, pair=pair, value=rng.normal(size=10), covariance=cov)


def _chi2_ref(r, cov):
    lp = stats.multivariate_normal(np.zeros(r.size), cov).logpdf(r)
    return -2 * lp - np.linalg.slogdet(2 * np.pi * cov)[1]


def test_blocks_against_scipy():
    rng = np.random.default_rng(0)
    data = _data(rng)
    model = rng.normal(size=10)
    r = data.value - model
    fq = fit_quality(data, model, _chi2_ref(r, data.covariance), n_params=2)
    assert fq.dof == 8 and fq.pte == pytest.approx(stats.chi2.sf(fq.chi2, 8))
    assert list(fq.by_pair) == ["TT 90x90", "TT 90x150", "EE 150x150"]
    for label, (c2, n) in fq.by_pair.items():
        rows = np.flatnonzero(pair_labels(data) == label)
        assert n == rows.size
        assert c2 == pytest.approx(_chi2_ref(r[rows], data.covariance[np.ix_(rows, rows)]), rel=1e-10)
        assert fq.block_pte((c2, n)) == pytest.approx(stats.chi2.sf(c2, n))
    rows = np.flatnonzero(data.kind == "TT")
    assert fq.by_kind["TT"][0] == pytest.approx(_chi2_ref(r[rows], data.covariance[np.ix_(rows, rows)]))


def test_single_channel_pairs_equal_kinds():
    rng = np.random.default_rng(1)
    data = _data(rng)
    data.pair = np.full(10, "")
    model = np.zeros(10)
    fq = fit_quality(data, model, 1.0, 0)
    assert fq.by_pair == fq.by_kind


def test_residual_figure_plots_d_minus_m_over_sigma():
    # Content check: each panel's plotted points equal (d − m)/σ with σ = sqrt(diag C) (definition).
    from infer.report.figures.residuals import residuals_figure
    rng = np.random.default_rng(2)
    data = _data(rng)
    data.ell_eff = np.arange(10.0) * 50 + 30
    model = rng.normal(size=10)
    fig = residuals_figure(data, model)
    sigma = np.sqrt(np.diag(data.covariance))
    found = {}
    for ax in fig.axes:
        for line in ax.lines:
            if (line.get_gid() or "").startswith("residuals "):
                found[line.get_gid()[10:]] = (line.get_xdata(), line.get_ydata())
    assert set(found) == {"TT 90x90", "TT 90x150", "EE 150x150"}
    for lab, (x, y) in found.items():
        rows = pair_labels(data) == lab
        np.testing.assert_allclose(y, (data.value[rows] - model[rows]) / sigma[rows])
        np.testing.assert_allclose(x, data.ell_eff[rows])
