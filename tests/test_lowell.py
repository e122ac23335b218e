"""Hamimeche–Lewis low-ℓ likelihood (infer.model.lowell).

References: the full-sky distribution of one field's Ĉ_ℓ, (2ℓ+1)Ĉ_ℓ/C_ℓ ~ χ²_{2ℓ+1}, and of the (T, E)
spectrum matrix, (2ℓ+1)Ĉ_ℓ ~ Wishart(2ℓ+1, C_ℓ) (common knowledge of the trade; Hamimeche & Lewis 2008,
PRD 77, 103013, §II), evaluated with scipy.stats.chi2 and scipy.stats.wishart.
"""
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats

from infer.errors import UserError
from infer.model import lowell


def _data(kind, ell, value, cov, fiducial, noise=None, pair=None):
    n = len(kind)
    return SimpleNamespace(kind=np.array(kind), ell_lo=np.array(ell), ell_hi=np.array(ell),
                           value=np.array(value, float), covariance=np.array(cov, float),
                           fiducial=np.array(fiducial, float),
                           noise=np.zeros(n) if noise is None else np.array(noise, float),
                           pair=np.array(pair or [""] * n), source="mem")


def _exact_minus2lnl(c_hat, c, ell):
    nu = 2 * ell + 1
    # density of Ĉ: χ²_ν density of ν Ĉ / C times the Jacobian ν / C (scipy.stats.chi2)
    return -2 * (stats.chi2.logpdf(nu * c_hat / c, nu) + np.log(nu / c))


@pytest.mark.parametrize("ell", [2, 5, 20])
@pytest.mark.parametrize("c_fid_ratio", [1.0, 0.7])
def test_scalar_equals_full_sky_chi2_up_to_a_constant(ell, c_fid_ratio):
    # Full sky, one field, M_f = 2 C_f² / (2ℓ+1): HL is exact for any C_f (Hamimeche & Lewis 2008 §II),
    # so −2 ln L_HL − (−2 ln L_exact) is the same number at every C (to round-off).
    c_hat, c_fid = 1.3, c_fid_ratio
    m_f = 2 * c_fid ** 2 / (2 * ell + 1)
    hl = lowell.HamimecheLewis(_data(["TT"], [ell], [c_hat], [[m_f]], [c_fid]), np.array([0]))
    cs = np.linspace(0.3, 4.0, 40)
    diff = np.array([hl.chi2(np.array([c])) - _exact_minus2lnl(c_hat, c, ell) for c in cs])
    assert np.ptp(diff) < 1e-9
    assert hl.chi2(np.array([-0.1])) == np.inf


def test_tends_to_gaussian_at_high_ell():
    # Over C within ±2σ of C_f (Ĉ one σ high), the largest |Δ(−2 ln L_HL) − Δ(−2 ln L_Gauss)| shrinks as
    # ℓ grows: the skewness of χ²_ν falls like 1/√ν, so the mismatch should fall by ≈ √10 per decade in ℓ
    # (measured 5.5, 1.2, 0.35 at ℓ = 30, 300, 3000).
    worst = []
    for ell in (30, 300, 3000):
        sigma = np.sqrt(2 / (2 * ell + 1))
        c_hat = 1 + sigma
        hl = lowell.HamimecheLewis(_data(["EE"], [ell], [c_hat], [[sigma ** 2]], [1.0]), np.array([0]))
        cs = 1 + sigma * np.linspace(-2, 2, 21)
        d_hl = np.array([hl.chi2(np.array([c])) for c in cs])
        d_g = (c_hat - cs) ** 2 / sigma ** 2
        worst.append(np.max(np.abs((d_hl - d_hl[10]) - (d_g - d_g[10]))))
    assert all(b < a / 2.5 for a, b in zip(worst, worst[1:])), worst
    assert worst[-1] < 0.5


def _te_block(ell, c, c_hat, c_fid):
    # Fiducial covariance of (TT, EE, TE) of one full-sky ℓ (Wishart second moments; common knowledge):
    # cov(Ĉ_ab, Ĉ_cd) = (C_ac C_bd + C_ad C_bc) / (2ℓ+1).
    tt, ee, te = c_fid[0, 0], c_fid[1, 1], c_fid[0, 1]
    m = np.array([[2 * tt ** 2, 2 * te ** 2, 2 * tt * te],
                  [2 * te ** 2, 2 * ee ** 2, 2 * ee * te],
                  [2 * tt * te, 2 * ee * te, tt * ee + te ** 2]]) / (2 * ell + 1)
    v = [c_hat[0, 0], c_hat[1, 1], c_hat[0, 1]]
    f = [c_fid[0, 0], c_fid[1, 1], c_fid[0, 1]]
    return lowell.HamimecheLewis(_data(["TT", "EE", "TE"], [ell] * 3, v, m, f), np.arange(3))


def test_matrix_form_equals_full_sky_wishart_up_to_a_constant():
    # Full sky, (T, E), M_f the Wishart covariance at C_f: vecp(X)ᵀ M_f⁻¹ vecp(X) = (ν/2) Tr g(A)² =
    # ν Σ (λ − ln λ − 1) with λ the eigenvalues of C^{-1/2} Ĉ C^{-1/2}, which is the Wishart −2 ln L up to a
    # constant whatever C_f is (Hamimeche & Lewis 2008 §III; reference values from scipy.stats.wishart).
    ell = 10
    nu = 2 * ell + 1
    c_fid = np.array([[1.0, 0.4], [0.4, 0.5]])
    c_hat = np.array([[1.1, 0.35], [0.35, 0.55]])
    hl = _te_block(ell, None, c_hat, c_fid)
    exact = lambda c: -2 * stats.wishart.logpdf(nu * c_hat, df=nu, scale=c)
    rng = np.random.default_rng(3)
    diffs = []
    for _ in range(20):
        a = rng.normal(size=(2, 2)) * 0.3
        c = c_fid @ (np.eye(2) + a @ a.T) + 0.0
        c = 0.5 * (c + c.T) + 0.2 * np.eye(2)
        diffs.append(hl.chi2(np.array([c[0, 0], c[1, 1], c[0, 1]])) - exact(c))
    assert np.ptp(diffs) < 1e-8, np.ptp(diffs)
    # A model spectrum matrix that is not positive definite has zero likelihood.
    assert hl.chi2(np.array([1.0, 0.5, 0.9])) == np.inf


def test_matrix_form_without_correlation_is_two_scalars():
    ell = 4
    c_fid = np.diag([1.0, 0.3])
    c_hat = np.array([[1.4, 0.0], [0.0, 0.2]])
    hl = _te_block(ell, None, c_hat, c_fid)
    m = np.array([0.9, 0.35, 0.0])
    scalar = sum(float(_exact_minus2lnl(h, c, ell) - _exact_minus2lnl(h, h, ell))
                 for h, c in ((1.4, 0.9), (0.2, 0.35)))
    assert hl.chi2(m) == pytest.approx(scalar, rel=1e-10)


def test_missing_fiducial_and_lonely_te_are_refused():
    with pytest.raises(UserError, match="fiducial.*band 0"):
        lowell.HamimecheLewis(_data(["TT"], [2], [1.0], [[1.0]], [np.nan]), np.array([0]))
    with pytest.raises(UserError, match="noise"):
        lowell.HamimecheLewis(_data(["TT"], [2], [1.0], [[1.0]], [1.0], noise=[np.nan]), np.array([0]))
    with pytest.raises(UserError, match="TE band"):
        lowell.HamimecheLewis(_data(["TE"], [2], [0.1], [[1.0]], [0.1]), np.array([0]))


def test_section_reader_checks_types_ranges_choices():
    read = lambda t: lowell.read_section("run.toml", t, ".", {}, ())
    assert read({}) == lowell.LikelihoodOptions("gaussian", 29)
    assert read({"low_ell": "hamimeche-lewis", "low_ell_max": 49}).low_ell_max == 49
    for bad, word in (({"low_ell": "wishart"}, "low_ell"), ({"low_ell_max": 1}, "low_ell_max"),
                      ({"low_ell_max": 2.5}, "low_ell_max"), ({"lmax": 3}, "unknown key")):
        with pytest.raises(UserError, match=word):
            read(bad)


def test_cross_correlation():
    cov = np.array([[1.0, 0.05, 0.3], [0.05, 1.0, 0.0], [0.3, 0.0, 1.0]])
    assert lowell.cross_correlation(cov, np.array([0])) == pytest.approx(0.3)
    assert lowell.cross_correlation(cov, np.arange(3)) == 0.0


# -- the option in a run: the likelihood splits the dataset ---------------------------------------------
def _run_with_low_ell(tmp_path, quick_data, engine="ensemble"):
    import dataclasses
    from infer import config, data as datasets
    from tests.conftest import quick_config_text
    bp = datasets.load(str(quick_data))
    fid = np.asarray(bp.value, float).copy()
    noise = np.where(bp.kind == "TE", 0.0, 5.0)
    # the Templateville bins start at ℓ = 30: cover the first two bins of each spectrum
    path = tmp_path / "low.h5"
    fields = {f.name: getattr(bp, f.name) for f in dataclasses.fields(bp)}
    datasets.write(datasets.from_arrays(kind=bp.kind, ell_lo=bp.ell_lo, ell_hi=bp.ell_hi, ell_eff=bp.ell_eff,
                                        value=bp.value, covariance=bp.covariance, noise=noise, fiducial=fid,
                                        experiment=fields["experiment"]), path)
    text = quick_config_text(path, tmp_path / "c.h5") + '\n[likelihood]\nlow_ell = "hamimeche-lewis"\nlow_ell_max = 129\n'
    if engine != "ensemble":
        text = text.replace("[sampling]\n", f'[sampling]\nengine = "{engine}"\n')
    run = tmp_path / "run.toml"
    run.write_text(text)
    return config.load(run)


def test_run_likelihood_is_gaussian_part_plus_hamimeche_lewis(tmp_path, quick_data):
    """ln L of a run with the option = Gaussian ln L of the other bands (scipy.stats.multivariate_normal)
    + the Hamimeche–Lewis term of the covered bands."""
    from scipy import stats
    from infer.model.posterior import Posterior
    post = Posterior(_run_with_low_ell(tmp_path, quick_data))
    like = post.like
    low = np.flatnonzero(post.data.ell_hi <= 129)
    rest = np.setdiff1d(np.arange(like.n), low)
    assert like.low is not None and low.size == 6
    x = np.array([p.guess for p in post.cfg.sampled])
    model = post.model_bands(x)
    gauss = stats.multivariate_normal(model[rest], post.data.covariance[np.ix_(rest, rest)]).logpdf(post.data.value[rest])
    hl = like.low
    expect = gauss - 0.5 * hl.chi2(model[low]) - hl.lognorm
    lp, blob, reason = post(x)
    assert reason is None and blob[0] == pytest.approx(expect, rel=1e-10, abs=1e-8)
    r = like.whiten(model)
    assert float(r @ r) == pytest.approx(like.chi2(model), rel=1e-10)       # the optimiser's χ² = rᵀr


def test_surrogate_engine_refuses_the_low_ell_option(tmp_path, quick_data):
    from infer.errors import UserError
    from infer.model.emulated import EmulatedProblem
    cfg = _run_with_low_ell(tmp_path, quick_data, engine="surrogate")
    with pytest.raises(UserError, match="not yet supported by the surrogate engine"):
        EmulatedProblem(cfg)
