"""Multi-frequency band powers: version-2 files, selection of pairs and ℓ ranges, their checks.

References: the Gaussian-likelihood rule that a cut keeps the sub-block of the covariance is common
practice (marginalising a multivariate normal over dropped bands keeps the sub-covariance; scipy.stats
checks it below); the file layout is ours (infer.data.hdf5).
"""
from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
from scipy import stats

from infer import config, data
from infer.data.bandpowers import Channel
from infer.errors import UserError

KINDS = ["TT"] * 4 + ["TE"] * 2 + ["EE"] * 2
C1 = ["90", "90", "150", "150", "90", "150", "90", "150"]
C2 = ["90", "90", "150", "150", "150", "150", "90", "150"]
LO = [30, 80, 30, 80, 30, 30, 30, 30]


def bands(**over):
    n = len(KINDS)
    rng = np.random.default_rng(3)
    a = rng.standard_normal((n, n))
    kw = dict(kind=np.array(KINDS), ell_lo=np.array(LO), ell_hi=np.array(LO) + 49,
              value=1000.0 + np.arange(n), covariance=a @ a.T + n * np.eye(n),
              channel_1=np.array(C1), channel_2=np.array(C2),
              channels=[Channel("90", 90.0, np.array([80.0, 90.0, 100.0]), np.array([0.5, 1.0, 0.5])),
                        Channel("150", 150.0)],
              beam_modes=0.01 * rng.standard_normal((2, n)),
              noise=np.array([1.0, 2.0, 3.0, 4.0, 0.0, 0.0, 5.0, np.nan]),
              fiducial=np.full(n, np.nan))
    kw.update(over)
    return data.from_arrays(**kw)


def same(a, b):
    for f in ("kind", "ell_lo", "ell_hi", "ell_eff", "value", "covariance", "window_ell", "window",
              "channel_1", "channel_2", "beam_modes", "noise", "fiducial"):
        x, y = getattr(a, f), getattr(b, f)
        assert np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), f
    assert [(c.name, c.nu_ghz) for c in a.channels] == [(c.name, c.nu_ghz) for c in b.channels]


def test_version_2_round_trip(tmp_path):
    bp = bands()
    back = data.load(str(data.write(bp, tmp_path / "mf.h5")))
    same(bp, back)
    assert back.pairs == ("90x90", "150x150", "90x150")
    np.testing.assert_array_equal(back.channels[0].bandpass_weight, [0.5, 1.0, 0.5])
    assert back.channels[1].bandpass_nu_ghz is None


def test_version_1_file_reads_as_one_unnamed_channel():
    bp = data.load("configs/data/kestrel_bandpowers.h5")
    assert bp.pairs == ("",) and bp.beam_modes.shape == (0, len(bp)) and np.isnan(bp.noise).all()


def test_selection_keeps_the_sub_covariance():
    bp = bands()
    cut = bp.cut(pairs=["150x150", "90x150"], ell_ranges={"TT": [30, 79], "TE 90x150": [30, 100]})
    keep = [2, 4, 5, 7]          # TT 150 [30,79]; TE 90x150; TE 150x150; EE 150x150
    np.testing.assert_array_equal(cut.value, bp.value[keep])
    np.testing.assert_array_equal(cut.covariance, bp.covariance[np.ix_(keep, keep)])
    np.testing.assert_array_equal(cut.beam_modes, bp.beam_modes[:, keep])
    # the marginal of a multivariate normal over the dropped bands is the sub-block (scipy.stats)
    x = bp.value + 1.0
    full = stats.multivariate_normal(bp.value, bp.covariance)
    draws = full.rvs(size=20000, random_state=1)[:, keep]
    assert np.allclose(np.cov(draws.T), cut.covariance, rtol=0.08, atol=0.08 * np.abs(cut.covariance).max())
    assert np.isfinite(full.logpdf(x))


def test_run_file_selection_reaches_the_cut(tmp_path):
    path = tmp_path / "mf.h5"
    data.write(bands(), path)
    text = (f'[dataset]\nfile = "{path}"\npairs = ["150x150"]\nell_ranges = {{ TT = [30, 79] }}\n'
            '[theory]\ncode = "templates"\n[parameters.a1]\nprior = { uniform = [0, 3] }\n'
            '[parameters.a2]\nprior = { uniform = [0, 3] }\n[parameters.a3]\nprior = { uniform = [0, 3] }\n')
    cfg = config.parse(text, str(tmp_path / "run.toml"))
    from infer.model.posterior import load_data
    cut = load_data(cfg)
    assert list(cut.pair) == ["150x150"] * 3 and list(cut.kind) == ["TT", "TE", "EE"] and list(cut.ell_lo) == [30, 30, 30]


@pytest.mark.parametrize("line, needle", [
    ('pairs = "90x150"', "dataset.pairs"),
    ('pairs = ["90-150"]', "'90-150'"),
    ('pairs = ["90x90", "90x90"]', "twice"),
    ('ell_ranges = { TT = [300, 30] }', "ell_min is above"),
    ('ell_ranges = { XX = [30, 300] }', "'XX'"),
    ('ell_ranges = { "TT 90-150" = [30, 300] }', "'TT 90-150'"),
    ('ell_ranges = { TT = [1, 300] }', "dataset.ell_ranges.TT"),
])
def test_bad_selection_is_one_line_at_parse_time(tmp_path, line, needle):
    text = (f'[dataset]\nfile = "x.h5"\n{line}\n[theory]\ncode = "templates"\n'
            '[parameters.a1]\nprior = { uniform = [0, 3] }\n')
    with pytest.raises(UserError) as err:
        config.parse(text, str(tmp_path / "run.toml"))
    assert needle in str(err.value) and "\n" not in str(err.value)


def test_unknown_pair_exits_2_before_any_theory_call(tmp_path):
    path = tmp_path / "mf.h5"
    data.write(bands(), path)
    run = tmp_path / "run.toml"
    run.write_text(f'[dataset]\nfile = "{path}"\npairs = ["90x220"]\n[theory]\ncode = "templates"\n'
                   + "".join(f"[parameters.a{i}]\nprior = {{ uniform = [0, 3] }}\nguess = 1.0\n" for i in (1, 2, 3)))
    res = subprocess.run([sys.executable, "-m", "infer", "check", str(run)], capture_output=True, text=True)
    assert res.returncode == 2 and res.stderr.count("\n") == 1
    assert "'90x220' is not a frequency pair" in res.stderr and "90x90" in res.stderr


@pytest.mark.parametrize("over, needle", [
    (dict(channel_1=np.array(["90"] * 7 + ["220"])), "220"),
    (dict(channels=[Channel("90", 90.0), Channel("150", None)]), "no frequency"),
    (dict(channels=[Channel("90", 90.0, np.array([80.0, 90.0]), np.array([0.0, 0.0])), Channel("150", 150.0)]),
     "does not integrate"),
    (dict(channels=[Channel("90", 90.0, np.array([90.0, 80.0]), np.array([1.0, 1.0])), Channel("150", 150.0)]),
     "ascending"),
    (dict(channels=[Channel("90", 90.0, np.array([80.0, 90.0]), np.array([1.0, -1.0])), Channel("150", 150.0)]),
     "negative weight"),
    (dict(beam_modes=np.zeros((2, 3))), "beam_modes"),
    (dict(noise=np.array([-1.0] + [0.0] * 7)), "negative noise"),
    (dict(noise=np.array([np.inf] + [0.0] * 7)), "infinities"),
])
def test_bad_multifrequency_fields_are_one_line(over, needle):
    with pytest.raises(UserError) as err:
        bands(**over)
    assert needle in str(err.value) and "\n" not in str(err.value)
