"""Run-file values at the edges of their documented ranges, and the prior normalisation that
`infer.config` checks at parse time.

External references: ``scipy.stats.truncnorm``, ``scipy.stats.norm`` and ``scipy.stats.uniform``
(log-densities and tail probabilities); the clock forms of wall-time strings are those batch
schedulers print (H:MM:SS, D-H:MM:SS — common practice).
"""
from __future__ import annotations

import math

import pytest
from scipy import stats

from infer import config
from infer.errors import UserError

from conftest import quick_config_text


@pytest.mark.parametrize("mu, sd, lo, hi", [
    (0.0, 1.0, -1.0, 2.0),          # bulk
    (0.0, 1.0, 8.0, 9.0),           # upper tail: Φ(9) − Φ(8) in doubles is 7 % off (cancellation)
    (0.0, 1.0, -9.0, -8.0),         # lower tail
    (0.054, 0.007, 0.01, 0.8),      # an optical-depth-like prior (illustrative numbers)
    (3.0, 0.5, 3.0, 3.0 + 1e-9),    # a very narrow range
])
def test_truncnormal_log_mass_against_scipy(mu, sd, lo, hi):
    a, b = (lo - mu) / sd, (hi - mu) / sd
    # Reference: the difference of scipy.stats.norm survival functions (accurate in the upper tail)
    # or CDFs (lower tail), whichever does not cancel.
    ref = math.log(stats.norm.sf(a) - stats.norm.sf(b)) if a > 0 else \
        math.log(stats.norm.cdf(b) - stats.norm.cdf(a))
    assert config.truncnormal_log_mass(mu, sd, lo, hi) == pytest.approx(ref, rel=1e-9)


def test_log_normalisation_against_scipy_densities():
    # A log-density is its constant plus the x-dependent part: scipy.stats gives the whole.
    tn = config.Prior("truncnormal", (1.0, 0.3, 0.5, 2.0))
    x = 1.2
    ref = stats.truncnorm((0.5 - 1.0) / 0.3, (2.0 - 1.0) / 0.3, loc=1.0, scale=0.3).logpdf(x)
    assert config.log_normalisation(tn) - 0.5 * ((x - 1.0) / 0.3) ** 2 == pytest.approx(ref, rel=1e-12)
    n = config.Prior("normal", (1.0, 0.3))
    assert config.log_normalisation(n) - 0.5 * ((x - 1.0) / 0.3) ** 2 == \
        pytest.approx(stats.norm(1.0, 0.3).logpdf(x), rel=1e-12)
    u = config.Prior("uniform", (-2.0, 5.0))
    assert config.log_normalisation(u) == pytest.approx(stats.uniform(-2.0, 7.0).logpdf(0.0), rel=1e-12)


@pytest.mark.parametrize("text, seconds", [
    ("47:30:00", 47 * 3600 + 30 * 60), ("0:59:59", 3599), ("2-23:59:59", 2 * 86400 + 86399),
    ("90m", 5400), ("1.5h", 5400), ("3600", 3600), (3600, 3600), ("366d", 366 * 86400),
])
def test_durations_accepted(text, seconds):
    assert config.parse_duration(text) == seconds


@pytest.mark.parametrize("text", ["1:60:00", "1:00:60", "2-24:00:00", "367d", "0", "", "1e3", "-5m", None])
def test_durations_refused_in_one_line(text):
    with pytest.raises(UserError) as err:
        config.parse_duration(text, "X")
    assert str(err.value).startswith("X: ") and "\n" not in str(err.value)


def test_range_edges_are_accepted(tmp_path, quick_data):
    # The documented limits themselves are valid values.
    text = quick_config_text(quick_data, tmp_path / "c.h5",
                             stopping_extra='ess_above = 1e12\ntau_multiple = 0\ntime_limit = "366d"')
    text = text.replace("seed = 11", f"seed = {2**63 - 1}").replace("ess_above = 1e9\n", "")
    text = text.replace('[theory]', 'ell_min = 2\nell_max = 100000\nspectra = ["TT", "TE", "EE"]\n[theory]')
    path = tmp_path / "edge.toml"
    path.write_text(text)
    cfg = config.load(path)
    assert cfg.seed == 2**63 - 1 and cfg.stopping.ess_above == 1e12
    assert cfg.stopping.time_limit == 366 * 86400 and cfg.dataset["spectra"] == ["TT", "TE", "EE"]


def test_truncated_normal_with_mean_outside_its_range_gets_a_guess_inside(tmp_path, quick_data):
    text = quick_config_text(quick_data, tmp_path / "c.h5",
                             priors={"a_1": "{ normal = [0.0, 1.0], range = [1.5, 3.0] }",
                                     "a_2": "{ uniform = [0.0, 3.0] }", "a_3": "{ uniform = [0.0, 3.0] }",
                                     "a_4": "{ uniform = [0.0, 3.0] }"})
    text = text.replace("guess = 1.0\nspread = 0.05\ntex = 'a_1'", "tex = 'a_1'")
    path = tmp_path / "tn.toml"
    path.write_text(text)
    a_1 = config.load(path).sampled[0]
    assert 1.5 < a_1.guess < 3.0 and 0 < a_1.spread <= 0.015
