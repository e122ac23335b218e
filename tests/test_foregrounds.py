"""Multi-frequency foreground and instrument terms, analytic marginalisation, priors on derived quantities.

References beside each check: Planck's law and its temperature derivative built here from CODATA
constants (scipy.constants), independently of infer.model.sed; the tSZ null near 217 GHz (common knowledge
of the trade); the closed-form Gaussian marginal likelihood N(d; m̄, C + TΣTᵀ) evaluated by
scipy.stats.multivariate_normal (Bridle et al. 2002, MNRAS 335, 1193 for its use in CMB likelihoods);
the linear-Gaussian posterior in closed form (Gelman et al. 2013, Bayesian Data Analysis, §14.2);
scipy.stats.norm for a prior on a derived quantity.
"""
from __future__ import annotations

import textwrap

import numpy as np
import pytest
from scipy import constants as sc
from scipy import stats

from infer import config, data
from infer.data import hdf5
from infer.data.bandpowers import Channel
from infer.errors import UserError
from infer.model.posterior import Posterior
from infer.theory.templates import TemplateTheory

CHANNELS = ("90", "150", "220")
PAIRS = [("90", "90"), ("90", "150"), ("90", "220"), ("150", "150"), ("150", "220"), ("220", "220")]
TRUTH = {"a_1": 1.0, "a_2": 1.0, "a_3": 1.0, "a_4": 1.0}
EDGES = np.arange(30, 1030, 100)


def layout_arrays():
    kind, c1, c2, lo = [], [], [], []
    for k in ("TT", "TE", "EE"):
        pairs = PAIRS if k != "TE" else [(a, b) for a in CHANNELS for b in CHANNELS]
        for a, b in pairs:
            for e in EDGES:
                kind.append(k), c1.append(a), c2.append(b), lo.append(e)
    return np.array(kind), np.array(c1), np.array(c2), np.array(lo)


def multifreq(value=None, beam_modes=None, cov_scale=1.0, tsz217=False):
    kind, c1, c2, lo = layout_arrays()
    n = len(kind)
    chans = [Channel("90", 90.0), Channel("150", 150.0, np.linspace(130, 170, 21), np.ones(21)),
             Channel("220", 217.0 if tsz217 else 220.0)]
    cov = cov_scale * np.diag(np.full(n, 400.0))
    return data.from_arrays(kind=kind, ell_lo=lo, ell_hi=lo + 99, value=np.ones(n) if value is None else value,
                            covariance=cov, channel_1=c1, channel_2=c2, channels=chans,
                            beam_modes=beam_modes, experiment="Merlin-test (invented)")


def run_file(tmp_path, params: str, nuisance: str = "", derived: str = "", ds=None) -> config.Config:
    ds = ds if ds is not None else multifreq()
    path = tmp_path / "mf.h5"
    if not path.exists():
        hdf5.write(ds, str(path))
    tsz = tmp_path / "tsz.txt"
    ell = np.arange(2, 5001)
    np.savetxt(tsz, np.c_[ell, (ell / 3000.0) ** 0.5])
    base = "".join(f"[parameters.{n}]\nprior = {{ uniform = [0.0, 3.0] }}\n" for n in TRUTH)
    text = textwrap.dedent(f"""\
        [dataset]
        file = "{path}"
        [theory]
        code = "templates"
        [sampling]
        walkers = 40
        [output]
        chain = "{tmp_path / 'chains' / 'mf.h5'}"
        """) + nuisance.replace("TSZ", str(tsz)) + "\n" + derived + "\n" + base + params
    cfg_path = tmp_path / "run.toml"
    cfg_path.write_text(text)
    return config.load(str(cfg_path))


# -- SEDs against a direct computation ---------------------------------------------------------------
def blackbody_law(nu, t):
    return 2 * sc.h * nu ** 3 / sc.c ** 2 / np.expm1(sc.h * nu / (sc.k * t))


def dbdt_numeric(nu, t=2.7255, h=1e-5):
    return (blackbody_law(nu, t + h) - blackbody_law(nu, t - h)) / (2 * h)


def test_cib_sed_against_a_direct_derivative_of_the_blackbody_law(tmp_path):
    # Reference: Planck's law from CODATA constants (scipy.constants), its T-derivative by central
    # differences; modified blackbody ν^β B_ν(T_d) (common practice). Band centres only for 90 and 220.
    cfg = run_file(tmp_path, "[parameters.cib_amp]\nvalue = 5.0\n", '[nuisance]\nterms = ["cib"]\n')
    post = Posterior(cfg)
    nu_model = post.like.nuisance
    v = nu_model.values({"cib_amp": 1.0, "cib_beta": 1.8, "cib_temp": 22.0, "cib_ell_index": 0.8})
    tpl = nu_model.terms[1].templates(v)["cib_amp"][0]
    d = post.data
    row = {p: np.flatnonzero((d.kind == "TT") & (d.pair == p))[3] for p in ("90x90", "220x220", "90x220")}

    def g(nu_ghz):
        nu = nu_ghz * 1e9
        return nu ** 1.8 * blackbody_law(nu, 22.0) / dbdt_numeric(nu)
    expect = (g(220.0) / g(90.0)) ** 2
    assert tpl[row["220x220"]] / tpl[row["90x90"]] == pytest.approx(expect, rel=1e-6)
    assert tpl[row["90x220"]] ** 2 == pytest.approx(tpl[row["90x90"]] * tpl[row["220x220"]], rel=1e-10)
    # Normalised at the reference frequency 150 GHz × 150 GHz with the power-law ℓ shape at ℓ = 3000:
    ell_mid = d.ell_lo[row["90x90"]] + np.arange(100)
    shape = np.mean((ell_mid / 3000.0) ** 0.8)
    assert tpl[row["90x90"]] == pytest.approx(shape * (g(90.0) / g(150.0)) ** 2, rel=1e-6)


def test_tsz_vanishes_near_217_ghz(tmp_path):
    # Reference: the non-relativistic tSZ null at x ≈ 3.83, ν ≈ 217 GHz (common knowledge of the trade).
    cfg = run_file(tmp_path, "[parameters.tsz_amp]\nvalue = 5.0\n",
                   '[nuisance]\nterms = ["tsz"]\ntsz_shape = "TSZ"\n', ds=multifreq(tsz217=True))
    post = Posterior(cfg)
    tpl = post.like.nuisance.terms[1].templates({})["tsz_amp"][0]
    d = post.data
    r217 = np.flatnonzero((d.kind == "TT") & (d.pair == "220x220"))
    r90 = np.flatnonzero((d.kind == "TT") & (d.pair == "90x90"))
    assert np.max(np.abs(tpl[r217])) < 1e-4 * np.max(np.abs(tpl[r90]))
    assert np.all(tpl[d.kind != "TT"] == 0)


def test_poisson_pairs_and_instrument_against_their_definitions(tmp_path):
    # Reference: a white C_ℓ is D_ℓ ∝ ℓ² (common practice); a spectrum is quadratic in the maps, so TT
    # scales as g_i g_j, TE as g_i g_j ε_j and EE as g_i g_j ε_i ε_j (common practice).
    rng = np.random.default_rng(4)
    modes = 0.01 * rng.standard_normal((2, len(layout_arrays()[0])))
    params = ("[parameters.ps_90x150]\nvalue = 12.0\n[parameters.cal_90]\nvalue = 1.01\n"
              "[parameters.cal_150]\nvalue = 0.98\n[parameters.poleff_150]\nvalue = 0.95\n"
              "[parameters.poleff_90]\nvalue = 1.02\n[parameters.beam_1]\nvalue = 0.7\n")
    cfg = run_file(tmp_path, params, '[nuisance]\nterms = ["poisson"]\n', ds=multifreq(beam_modes=modes))
    post = Posterior(cfg)
    d = post.data
    spectra = TemplateTheory(1100, {}).compute(TRUTH)
    B = post.like.binned(spectra)
    got = post.like.model(spectra, post.nuisance_values(np.ones(4)))
    ell = np.asarray(d.window_ell, float)
    ps = np.where((d.kind == "TT") & (d.pair == "90x150"), d.window @ (ell / 3000.0) ** 2, 0.0)
    g = {"90": 1.01, "150": 0.98, "220": 1.0}
    e = {"90": 1.02, "150": 0.95, "220": 1.0}
    s = np.array([g[a] * g[b] * (1.0 if k == "TT" else e[b] if k == "TE" else e[a] * e[b])
                  for k, a, b in zip(d.kind, d.channel_1, d.channel_2)])
    expect = s * (1 + 0.7 * modes[1]) * (B + 12.0 * ps)
    np.testing.assert_allclose(got, expect, rtol=1e-12)


# -- analytic marginalisation -----------------------------------------------------------------------
ANALYTIC = ("[parameters.ps_90x90]\nprior = { normal = [10.0, 4.0] }\nanalytic = true\n"
            "[parameters.tsz_amp]\nprior = { normal = [5.0, 2.0] }\nanalytic = true\n"
            "[parameters.cal_150]\nprior = { uniform = [0.9, 1.1] }\n")
NUIS = '[nuisance]\nterms = ["poisson", "tsz"]\ntsz_shape = "TSZ"\n'


def test_analytic_marginal_equals_closed_form_gaussian(tmp_path):
    # Reference: ∫ N(d; m(a), C) N(a; μ, Σ) da = N(d; m(μ), C + TΣTᵀ) for m linear in a (Bridle et al.
    # 2002); evaluated by scipy.stats.multivariate_normal with T built here by finite differences.
    rng = np.random.default_rng(5)
    n = len(layout_arrays()[0])
    ds = multifreq(value=3000 * rng.random(n))
    cfg = run_file(tmp_path, ANALYTIC, NUIS, ds=ds)
    post = Posterior(cfg)
    x = np.array([1.1, 0.9, 1.05, 0.97, 1.03])
    lp, blob, why = post(x)
    assert why is None
    spectra = TemplateTheory(1100, {}).compute(dict(zip(post.names[:4], x[:4])))
    B = post.like.binned(spectra)
    nm = post.like.nuisance
    mu = {"ps_90x90": 10.0, "tsz_amp": 5.0}

    def m_at(**a):
        return nm.apply(B, {"cal_150": x[4], **mu, **a})
    T = np.stack([m_at(ps_90x90=11.0) - m_at(), m_at(tsz_amp=6.0) - m_at()], axis=1)
    cov = np.asarray(ds.covariance) + T @ np.diag([16.0, 4.0]) @ T.T
    ref = stats.multivariate_normal(m_at(), cov).logpdf(np.asarray(ds.value))
    assert blob[0] == pytest.approx(ref, rel=1e-10, abs=1e-8)
    # The whitened residuals of the fit carry the same χ²:
    r = post.like.whiten_bands(B, post.nuisance_values(x))
    assert float(r @ r) == pytest.approx(blob[-1], rel=1e-10)


def test_analytic_marginal_gives_the_closed_form_linear_posterior(tmp_path):
    # Reference: the linear-Gaussian posterior (Gelman et al. 2013, BDA §14.2). With the template theory
    # the model is linear in (a_1..a_4, ps_90x90, tsz_amp); marginalising the last two analytically must
    # leave exactly the closed-form marginal posterior of a_1..a_4: its log-density differences equal
    # those of N(μ_post, Σ_post) restricted to the a's.
    rng = np.random.default_rng(6)
    n = len(layout_arrays()[0])
    ds0 = multifreq()
    theory = TemplateTheory(1100, {})
    A = theory.design_matrix(ds0.kind, ds0.window_ell, ds0.window)
    cfg0 = run_file(tmp_path, ANALYTIC.replace("[parameters.cal_150]\nprior = { uniform = [0.9, 1.1] }\n", ""), NUIS)
    nm = Posterior(cfg0).like.nuisance
    v = nm.values({})
    F = np.stack([nm.terms[1].templates(v)["ps_90x90"][0], nm.terms[2].templates(v)["tsz_amp"][0]], axis=1)
    truth = np.array([1, 1, 1, 1, 10, 5.0])
    X = np.hstack([A, F])
    value = X @ truth + 20 * rng.standard_normal(n)
    (tmp_path / "mf.h5").unlink()
    cfg = run_file(tmp_path, ANALYTIC.replace("[parameters.cal_150]\nprior = { uniform = [0.9, 1.1] }\n", ""),
                   NUIS, ds=multifreq(value=value))
    post = Posterior(cfg)
    cinv = np.eye(n) / 400.0
    prec = X.T @ cinv @ X + np.diag([0, 0, 0, 0, 1 / 16.0, 1 / 4.0])
    rhs = X.T @ cinv @ value + np.array([0, 0, 0, 0, 10 / 16.0, 5 / 4.0])
    cov = np.linalg.inv(prec)
    mean = cov @ rhs
    marg = stats.multivariate_normal(mean[:4], cov[:4, :4])
    pts = mean[:4] + 0.02 * rng.standard_normal((5, 4))
    got = np.array([post(p)[0] for p in pts])
    ref = marg.logpdf(pts)
    np.testing.assert_allclose(got - got[0], ref - ref[0], rtol=0, atol=1e-8)


@pytest.mark.slow
def test_sampled_marginal_equals_the_analytic_one(tmp_path):
    # Reference: the closed-form linear-Gaussian posterior (Gelman et al. 2013, BDA §14.2) — the analytic
    # marginal equals it exactly (test above); here the ensemble sampler (numerical marginalisation, the
    # amplitudes sampled with the same Gaussian priors) must agree within Monte Carlo error.
    from infer.analysis.diagnostics import ess_bulk
    from infer.cli import main
    from infer.store.chainfile import ChainStore
    rng = np.random.default_rng(6)
    n = len(layout_arrays()[0])
    sampled = ANALYTIC.replace("analytic = true\n", "").replace(
        "[parameters.cal_150]\nprior = { uniform = [0.9, 1.1] }\n", "")
    cfg0 = run_file(tmp_path, sampled, NUIS)
    nm = Posterior(cfg0).like.nuisance
    v = nm.values({})
    ds0 = multifreq()
    A = TemplateTheory(1100, {}).design_matrix(ds0.kind, ds0.window_ell, ds0.window)
    F = np.stack([nm.terms[1].templates(v)["ps_90x90"][0], nm.terms[2].templates(v)["tsz_amp"][0]], axis=1)
    X = np.hstack([A, F])
    value = X @ np.array([1, 1, 1, 1, 10, 5.0]) + 20 * rng.standard_normal(n)
    (tmp_path / "mf.h5").unlink()
    cfg = run_file(tmp_path, sampled.replace("}\n", "}\nspread = 0.5\n", 2), NUIS, ds=multifreq(value=value))
    text = open(cfg.path).read().replace("walkers = 40", "walkers = 16\nsteps = 1500\nworkers = 0")
    text = text.replace("[sampling]", "[stopping]\nrhat_below = 1.01\ness_above = 1e9\n[sampling]")
    open(cfg.path, "w").write(text)
    assert main(["--quiet", "run", cfg.path]) == 0
    s = ChainStore(str(tmp_path / "chains" / "mf.h5")).read().samples.after(300)
    cinv = np.eye(n) / 400.0
    prec = X.T @ cinv @ X + np.diag([0, 0, 0, 0, 1 / 16.0, 1 / 4.0])
    cov = np.linalg.inv(prec)
    mean = cov @ (X.T @ cinv @ value + np.array([0, 0, 0, 0, 10 / 16.0, 5 / 4.0]))
    x = s.position.reshape(-1, len(s.names))
    idx = [list(s.names).index(k) for k in TRUTH]
    ess = np.array([ess_bulk(np.moveaxis(s.position[..., i], 0, -1).reshape(-1, s.steps)) for i in idx])
    sd = np.sqrt(np.diag(cov))[:4]
    z = (x[:, idx].mean(0) - mean[:4]) / (sd / np.sqrt(ess))
    assert np.all(np.abs(z) < 4.5), z
    rel = x[:, idx].std(0, ddof=1) / sd - 1
    assert np.all(np.abs(rel) < 5 / np.sqrt(2 * ess)), rel


@pytest.mark.parametrize("params, nuisance, needle", [
    ("[parameters.calibration]\nprior = { normal = [1.0, 0.01] }\nanalytic = true\n", "", "non-linearly"),
    ("[parameters.ps_90x90]\nprior = { uniform = [0.0, 30.0] }\nanalytic = true\n", NUIS, "untruncated normal"),
    ("[parameters.ps_90x90]\nprior = { normal = [1.0, 1.0], range = [0, 5] }\nanalytic = true\n", NUIS,
     "untruncated normal"),
    ("[parameters.ps_90x90]\nprior = { normal = [1.0, 1.0] }\nanalytic = true\n"
     "[parameters.beam_0]\nprior = { normal = [0.0, 1.0] }\nanalytic = true\n", NUIS, "product"),
    ("[parameters.cib_beta]\nprior = { uniform = [-10.0, 2.0] }\n", '[nuisance]\nterms = ["cib"]\n',
     "physical range"),
    ("[parameters.dust_ee_amp]\nvalue = 1.0\n", '[nuisance]\nterms = ["cib"]\n', "not read by theory"),
    ("[parameters.ps_amp]\nvalue = 1.0\n", '[nuisance]\nterms = ["poisson"]\n', "not read by theory"),
    ("[parameters.tsz_amp]\nvalue = 1.0\n", '[nuisance]\nterms = ["tsz"]\n', "tsz_shape"),
    ("", '[nuisance]\nterms = ["radio"]\n', "unknown term"),
    ("", '[nuisance]\nterms = ["tsz"]\ntsz_shape = "/nonexistent/shape.txt"\n', "cannot read"),
    ("", '[nuisance]\nterms = ["tsz"]\nreference_ghz = 217.5\ntsz_shape = "TSZ"\n', "null"),
])
def test_bad_nuisance_input_is_one_line(tmp_path, params, nuisance, needle):
    rng = np.random.default_rng(1)
    ds = multifreq(beam_modes=0.01 * rng.standard_normal((1, len(layout_arrays()[0]))))
    with pytest.raises(UserError) as err:
        Posterior(run_file(tmp_path, params, nuisance, ds=ds))
    assert needle in str(err.value) and "\n" not in str(err.value)


def test_foreground_terms_refuse_single_channel_data(tmp_path):
    from conftest import make_quick_dataset
    ds = data.load(make_quick_dataset(tmp_path / "q.h5"))
    with pytest.raises(UserError, match="named frequency channels"):
        Posterior(run_file(tmp_path, "", '[nuisance]\nterms = ["cib"]\n', ds=ds))


# -- priors on derived quantities -------------------------------------------------------------------
def test_derived_prior_adds_its_log_density(tmp_path):
    # Reference: scipy.stats.norm for the Gaussian prior on the derived a_sum = Σ a_k of the template model.
    cfg0 = run_file(tmp_path, "")
    cfg = run_file(tmp_path, "", derived="[derived.a_sum]\nprior = { normal = [4.1, 0.05] }\n")
    p0, p1 = Posterior(cfg0), Posterior(cfg)
    for x in ([1.0, 1.0, 1.0, 1.0], [1.1, 0.9, 1.2, 0.95]):
        x = np.array(x)
        assert p1(x)[0] - p0(x)[0] == pytest.approx(stats.norm(4.1, 0.05).logpdf(x.sum()), rel=0, abs=1e-9)
    cfg_u = run_file(tmp_path, "", derived="[derived.a_sum]\nprior = { uniform = [3.5, 4.5] }\n")
    lp, _, why = Posterior(cfg_u)(np.array([1.5, 1.5, 1.5, 1.5]))
    assert lp == -np.inf and why == "outside-derived-prior"


def test_derived_prior_map_is_the_closed_form(tmp_path):
    # Reference: a Gaussian prior on the linear function s = 1ᵀa adds the precision 11ᵀ/σ² to the
    # linear-Gaussian posterior (Gelman et al. 2013, BDA §14.2); the fit's MAP must be its mean.
    from infer.fit import bestfit
    rng = np.random.default_rng(8)
    ds0 = multifreq()
    A = TemplateTheory(1100, {}).design_matrix(ds0.kind, ds0.window_ell, ds0.window)
    n = len(ds0.kind)
    value = A @ np.ones(4) + 20 * rng.standard_normal(n)
    cfg = run_file(tmp_path, "", derived="[derived.a_sum]\nprior = { normal = [3.9, 0.01] }\n",
                   ds=multifreq(value=value))
    res = bestfit.fit(cfg, starts=1, workers=0)
    cinv = np.eye(n) / 400.0
    prec = A.T @ cinv @ A + np.ones((4, 4)) / 0.01 ** 2
    mean = np.linalg.solve(prec, A.T @ cinv @ value + np.ones(4) * 3.9 / 0.01 ** 2)
    np.testing.assert_allclose([res.best[k] for k in TRUTH], mean, rtol=0, atol=2e-4)


@pytest.mark.parametrize("derived, needle", [
    ("[derived.H0]\nprior = { normal = [67.0, 1.0] }\n", "not a derived quantity"),
    ("[derived.a_1]\nprior = { normal = [1.0, 1.0] }\n", "parameter of the run"),
    ("[derived.a_sum]\nlimits = [1, 2]\n", "unknown key"),
])
def test_bad_derived_prior_is_one_line(tmp_path, derived, needle):
    with pytest.raises(UserError) as err:
        Posterior(run_file(tmp_path, "", derived=derived))
    assert needle in str(err.value) and "\n" not in str(err.value)
