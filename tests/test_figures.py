"""Figures assert what they show: the plotted data, read back from the figure objects.

References used below:
* scipy.stats (PyPI reference library): ``chi2(2).ppf(m)`` is the squared Mahalanobis radius of the
  mass-m highest-density region of a 2-D Gaussian; ``multivariate_normal.logpdf`` gives
  −2 ln L = χ² + ln det(2πC) of a Gaussian likelihood; ``norm.pdf`` for a 1-D marginal.
* AR(1) integrated autocorrelation time τ = (1 + ρ)/(1 − ρ) (textbook; e.g. Sokal 1997, lecture notes,
  from memory).
"""
from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from matplotlib.contour import ContourSet
from scipy import stats

from infer.analysis.samples import Samples
from infer.config import Stopping
from infer.report import figures

MEAN, COV = np.array([0.5, -1.0]), np.array([[0.01, 0.006], [0.006, 0.04]])


@pytest.fixture(scope="module")
def gauss():
    rng = np.random.default_rng(20240611)
    g = stats.multivariate_normal(MEAN, COV).rvs(size=40000, random_state=rng)
    pos = g.reshape(400, 4, 25, 2)
    zeros = np.zeros((400, 4, 25))
    s = Samples(("g1", "g2"), (), pos, np.zeros((400, 4, 25, 0)), zeros, zeros,
                tex={"g1": r"\gamma_1", "g2": r"\gamma_2"})
    return s, g


def _line_contours(ax) -> ContourSet:
    return next(c for c in ax.collections if isinstance(c, ContourSet) and not c.filled)


def test_triangle_contours_enclose_gaussian_hpd_masses(gauss):
    s, g = gauss
    fig = figures.triangle_figure(s, ["g1", "g2"], best={"g1": 0.52, "g2": -0.98})
    pair = fig.axes[2]                               # row 1, column 0 of the 2 × 2 grid
    d = g - MEAN
    r2 = np.einsum("ij,ij->i", d, np.linalg.solve(COV, d.T).T)
    for path, mass in zip(_line_contours(pair).get_paths(), (0.95, 0.68)):   # levels drawn low to high
        inside = path.contains_points(g)
        # the drawn region holds the stated fraction of the draws …
        assert inside.mean() == pytest.approx(mass, abs=0.025), mass
        # … and is the Gaussian's highest-density region r² ≤ χ²₂.ppf(m) (scipy.stats.chi2)
        hpd = r2 <= stats.chi2(2).ppf(mass)
        assert np.mean(inside != hpd) < 0.03, mass
    best = [ln for ln in pair.lines if ln.get_marker() == "D"]
    assert len(best) == 1 and np.allclose(best[0].get_xydata(), [[0.52, -0.98]])


def test_triangle_diagonal_is_the_marginal_density(gauss):
    s, _ = gauss
    fig = figures.triangle_figure(s, ["g1", "g2"])
    for ax, k in ((fig.axes[0], 0), (fig.axes[3], 1)):
        curve = max(ax.lines, key=lambda ln: len(ln.get_xdata()))
        x, y = np.asarray(curve.get_xdata()), np.asarray(curve.get_ydata())
        ref = stats.norm(MEAN[k], np.sqrt(COV[k, k])).pdf(x)        # scipy.stats as reference
        ref /= ref.max()                                            # the panel is normalised to its peak
        assert np.max(np.abs(y - ref)) < 0.06, k


def test_trace_lines_equal_the_chain():
    rng = np.random.default_rng(2)
    steps, ens, walk = 50, 2, 20
    pos = rng.standard_normal((steps, ens, walk, 2))
    lp = -0.5 * np.sum(pos**2, axis=-1)
    s = Samples(("a", "b"), (), pos, np.zeros((steps, ens, walk, 0)), lp, lp)
    fig = figures.traces_figure(s, burn=7, max_walkers=6)
    lines = {ln.get_gid(): ln for ax in fig.axes for ln in ax.lines if (ln.get_gid() or "").startswith("trace")}
    walkers = np.unique(np.linspace(0, walk - 1, 6).round().astype(int))
    assert len(lines) == 3 * ens * len(walkers)                     # ln P and two parameters
    for e in range(ens):
        for w in walkers:
            assert np.array_equal(lines[f"trace a ensemble {e} walker {w}"].get_ydata(), pos[:, e, w, 0])
            assert np.array_equal(lines[f"trace b ensemble {e} walker {w}"].get_ydata(), pos[:, e, w, 1])
            assert np.array_equal(lines[f"trace log_post ensemble {e} walker {w}"].get_ydata(), lp[:, e, w])
            assert np.array_equal(lines[f"trace a ensemble {e} walker {w}"].get_xdata(), np.arange(steps))
    assert figures.render(fig).shape[2] == 4


def _dataset(seed=4):
    rng = np.random.default_rng(seed)
    lo = np.tile(np.arange(30, 1000, 50), 2)
    kind = np.array(["TT"] * 20 + ["EE"] * 20)
    eff = lo + 24.5
    model = np.where(kind == "TT", 3000 * np.exp(-eff / 600), 20 + 10 * np.sin(eff / 60))
    sig = np.where(kind == "TT", 40.0, 1.0)
    a = rng.standard_normal((40, 40)) * 0.1
    cov = np.diag(sig) @ (np.eye(40) + a @ a.T / 40) @ np.diag(sig)   # correlated bands
    value = rng.multivariate_normal(model, cov)
    return SimpleNamespace(kind=kind, ell_lo=lo, ell_hi=lo + 49, ell_eff=eff, value=value, covariance=cov,
                           to_dl=np.ones(40), spectra=("TT", "EE"), experiment="Fictional Array"), model


def test_bandpower_residuals_and_chi2():
    ds, model = _dataset()
    fig = figures.bandpowers_figure(ds, model)
    sigma = np.sqrt(np.diag(ds.covariance))
    for k in ("TT", "EE"):
        m = ds.kind == k
        res = next(ln for ax in fig.axes for ln in ax.lines if ln.get_gid() == f"residuals {k}")
        assert np.allclose(res.get_ydata(), (ds.value[m] - model[m]) / sigma[m], rtol=1e-12)
        mod = next(ln for ax in fig.axes for ln in ax.lines if ln.get_gid() == f"model {k}")
        assert np.allclose(np.sort(mod.get_ydata()), np.sort(model[m]))
    # χ² in the title against scipy.stats.multivariate_normal: −2 ln L = χ² + ln det(2πC)
    logdet = np.linalg.slogdet(2 * np.pi * ds.covariance)[1]
    chi2 = -2 * stats.multivariate_normal(model, ds.covariance).logpdf(ds.value) - logdet
    title = next(t.get_text() for t in fig.texts if t.get_text().startswith("χ² = "))
    assert title.startswith(f"χ² = {chi2:.1f} for 40 bands")
    # the likelihood's fit quality, when given, is the one shown (total and per kind)
    fit = SimpleNamespace(chi2=12.25, by_kind={"TT": (7.5, 20), "EE": (3.25, 20)})
    fig = figures.bandpowers_figure(ds, model, fit)
    assert any(t.get_text().startswith("χ² = 12.2 for 40 bands") for t in fig.texts)
    titles = [ax.get_title(loc="left") for ax in fig.axes]
    assert "TT:  χ² = 7.5 for 20 bands" in titles and "EE:  χ² = 3.2 for 20 bands" in titles


def _ar1_samples(rho, steps, ens=2, walk=16, seed=0):
    rng = np.random.default_rng(seed)
    x = np.empty((steps, ens, walk, 2))
    z = rng.standard_normal((ens, walk, 2))                        # stationary start
    for t in range(steps):
        z = rho * z + np.sqrt(1 - rho**2) * rng.standard_normal(z.shape)
        x[t] = z
    lp = -0.5 * np.sum(x**2, axis=-1)
    return Samples(("a", "b"), (), x, np.zeros((steps, ens, walk, 0)), lp, lp)


def test_convergence_figure_plots_history_and_marks_untrusted_ess():
    rho = 28 / 30                                                   # τ = (1 + ρ)/(1 − ρ) = 29 steps
    s = _ar1_samples(rho, 2400)
    rule = Stopping(ess_above=300.0)
    h = figures.convergence_history(s, rule, n_points=8)
    # prefixes shorter than 50 τ ≈ 1450 steps cannot be trusted, the longer ones can
    assert np.array_equal(h["trusted"], h["step"] > 50 * h["tau_max"])
    assert not h["trusted"][:3].any() and h["trusted"][-3:].all(), (h["step"], h["tau_max"])
    assert h["tau_max"][-1] == pytest.approx(29, rel=0.25)
    fig = figures.convergence_figure(h, rule)
    lines = {ln.get_gid(): ln for ax in fig.axes for ln in ax.lines if ln.get_gid()}
    good = h["trusted"] & np.isfinite(h["ess_bulk_min"])
    assert np.array_equal(lines["ess_bulk"].get_xdata(), h["step"][good])
    assert np.array_equal(lines["ess_bulk"].get_ydata(), h["ess_bulk_min"][good])
    shaky = lines["ess_unreliable"]
    assert np.array_equal(shaky.get_xdata(), h["step"][~h["trusted"]])
    assert "not measurable yet" in shaky.get_label()
    assert np.allclose(lines["rhat"].get_ydata(), np.clip(h["rhat_max"] - 1, 1e-5, None))
    target = [ln for ln in fig.axes[1].lines if np.allclose(ln.get_ydata(), 300.0)]
    assert target, "the ESS target line is the run's own target"
