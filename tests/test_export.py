"""``infer export``: ArviZ NetCDF and plain tables of a chain, checked against ArviZ and numpy.

References: ArviZ (PyPI) reads the NetCDF file (``arviz.from_netcdf``) and its ``summary`` (mean, sd,
bulk ESS) and ``rhat`` are the outside computation our numbers (infer.analysis) must equal; numpy
(``loadtxt``/``genfromtxt``) reads the tables back.
"""
from __future__ import annotations

import math
import shutil
import warnings
from pathlib import Path

import numpy as np
import pytest

from infer.analysis.marginals import constraints
from infer.analysis.weighted import weighted_constraints
from infer.cli import main
from infer.report.export import load_run

az = pytest.importorskip("arviz")

REPO = Path(__file__).resolve().parents[1]
STEPS = 240


@pytest.fixture(scope="module")
def quick_chain(tmp_path_factory):
    """configs/quick.toml (the exactly solvable model and its shipped data set), a few hundred steps."""
    chain = tmp_path_factory.mktemp("export") / "quick.h5"
    assert main(["--quiet", "run", str(REPO / "configs" / "quick.toml"), "--steps", str(STEPS),
                 "--chain", str(chain)]) == 0
    return chain


def _one_line_error(capsys, code):
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("infer: error: ") and err.count("\n") == 1 and "Traceback" not in err
    return err


@pytest.mark.slow
def test_netcdf_opens_in_arviz_and_its_summary_equals_ours(quick_chain, tmp_path):
    out = tmp_path / "quick.nc"
    assert main(["--quiet", "export", str(quick_chain), str(out)]) == 0
    idata = az.from_netcdf(out)                       # reference: ArviZ (PyPI)
    run = load_run(quick_chain)
    cons, info = constraints(run.samples, run.burn)
    steps, ens, walk = run.kept.position.shape[:3]
    assert info["burn"] == run.burn.burn and steps == STEPS - run.burn.burn
    post = idata.posterior
    assert post.sizes["chain"] == ens * walk and post.sizes["draw"] == steps
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        summ = az.summary(idata, kind="all", round_to="none")     # reference: ArviZ (PyPI)
    for c in cons:
        row = summ.loc[c.name]
        assert row["mean"] == pytest.approx(c.mean, rel=1e-12, abs=1e-12)
        assert row["sd"] == pytest.approx(c.sd, rel=1e-10)
        # chain = walker, draw = step: ArviZ's bulk ESS is computed on the sequences ours uses
        assert row["ess_bulk"] == pytest.approx(c.ess_bulk, rel=1e-9)
        # our R̂ compares the independent ensembles (walkers flattened step-major): regroup and ask ArviZ
        x = post[c.name].values
        by_ensemble = x.reshape(ens, walk, steps).transpose(0, 2, 1).reshape(ens, steps * walk)
        assert float(az.rhat(by_ensemble, method="rank")) == pytest.approx(c.rhat, abs=1e-12)
        assert post[c.name].attrs["tex"] == c.tex
    # the documented layout: chain c is walker c % W of ensemble c // W; step is 1-based in the full run
    p = run.samples.names.index("a_2")
    c_idx, t = 21, 7
    assert post["ensemble"].values[c_idx] == c_idx // walk and post["walker"].values[c_idx] == c_idx % walk
    assert post["step"].values[t] == run.burn.burn + t + 1
    assert post["a_2"].values[c_idx, t] == run.samples.position[run.burn.burn + t, c_idx // walk, c_idx % walk, p]
    lp = idata.sample_stats["lp"].values
    assert lp[c_idx, t] == run.samples.log_post[run.burn.burn + t, c_idx // walk, c_idx % walk]
    assert idata.attrs["format"] == "infer-export" and idata.attrs["run_name"] == "quick"


@pytest.mark.slow
def test_csv_and_text_tables_read_back_the_same_values(quick_chain, tmp_path):
    run = load_run(quick_chain, burn=40, thin=3)
    for suffix, delim in ((".csv", ","), (".txt", None)):
        out = tmp_path / f"quick{suffix}"
        assert main(["--quiet", "export", str(quick_chain), str(out), "--burn", "40", "--thin", "3"]) == 0
        data = np.loadtxt(out, delimiter=delim)         # reference: numpy.loadtxt
        steps = len(range(40, STEPS, 3))
        assert data.shape == (steps * 2 * 16, 2 + len(run.all_names))
        assert np.array_equal(data[:, 1], run.samples.log_post[40::3].reshape(-1))
        for i, name in enumerate(run.all_names):
            assert np.array_equal(data[:, 2 + i], run.samples.column(name)[40::3].reshape(-1)), name
        assert np.allclose(data[:, 0], 1.0 / len(data), rtol=0, atol=0)
        named = np.genfromtxt(out, delimiter=delim, names=True)
        assert named.dtype.names == ("weight", "ln_posterior") + run.all_names
        head = out.read_text().splitlines()[:20]
        text = "\n".join(head)
        assert str(quick_chain.resolve()) in text and "# run: quick" in text
        assert "burn-in 40 of 240 steps" in text and "one step in 3 after it" in text
        assert "a_sum  $\\Sigma a$  derived" in text and "a_1  $a_1$  sampled, prior support [0, 3]" in text


@pytest.mark.slow
def test_outputs_are_protected_and_bad_input_is_one_line(quick_chain, tmp_path, capsys):
    out = tmp_path / "draws.csv"
    assert main(["--quiet", "export", str(quick_chain), str(out)]) == 0
    first = out.read_bytes()
    _one_line_error(capsys, main(["--quiet", "export", str(quick_chain), str(out)]))     # no --replace
    assert out.read_bytes() == first
    assert main(["--quiet", "export", str(quick_chain), str(out), "--replace", "--thin", "2"]) == 0
    assert out.read_bytes() != first                                    # an earlier export is replaced
    mine = tmp_path / "mine.csv"
    mine.write_text("1,2,3\n")
    err = _one_line_error(capsys, main(["--quiet", "export", str(quick_chain), str(mine), "--replace"]))
    assert "not written by `infer export`" in err and mine.read_text() == "1,2,3\n"
    nc = tmp_path / "user.nc"
    nc.write_bytes(b"\x89HDF\r\n")
    _one_line_error(capsys, main(["--quiet", "export", str(quick_chain), str(nc), "--replace"]))
    assert nc.read_bytes() == b"\x89HDF\r\n"
    err = _one_line_error(capsys, main(["--quiet", "export", str(quick_chain), str(tmp_path / "x.json")]))
    assert "x.json" in err and ".nc" in err
    err = _one_line_error(capsys, main(["--quiet", "export", str(quick_chain), str(tmp_path / "x.csv"),
                                        "--burn", str(STEPS)]))
    assert "--burn" in err and not (tmp_path / "x.csv").exists()
    _one_line_error(capsys, main(["--quiet", "export", str(quick_chain), str(tmp_path / "x.csv"), "--thin", "0"]))
    err = _one_line_error(capsys, main(["--quiet", "export", str(tmp_path / "none.h5"), str(tmp_path / "y.nc")]))
    assert "none.h5" in err and not (tmp_path / "y.nc").exists()
    err = _one_line_error(capsys, main(["--quiet", "export", str(mine), str(tmp_path / "y.nc")]))
    assert "mine.csv" in err and not (tmp_path / "y.nc").exists()
    same = tmp_path / "chain.nc"                     # a chain file that happens to be named .nc
    shutil.copyfile(quick_chain, same)
    before = same.read_bytes()
    err = _one_line_error(capsys, main(["--quiet", "export", str(same), str(same), "--replace"]))
    assert "is the chain itself" in err and same.read_bytes() == before


def test_bad_suffix_and_missing_chain_are_refused_before_reading(tmp_path, capsys):
    _one_line_error(capsys, main(["--quiet", "export", str(tmp_path / "none.h5"), str(tmp_path / "a.h5")]))
    _one_line_error(capsys, main(["--quiet", "export", str(tmp_path / "none.h5"), str(tmp_path / "a.nc")]))
    assert not list(tmp_path.iterdir())


# -- the surrogate engine's weighted sample ---------------------------------------------------------------


def _engine_run_file(tmp_path) -> Path:
    """configs/quick.toml run by the surrogate engine (weight-ESS target 500)."""
    data = REPO / "configs" / "data" / "quick_bandpowers.h5"
    text = (REPO / "configs" / "quick.toml").read_text()
    text = text.replace('file = "data/quick_bandpowers.h5"', f'file = "{data}"')
    text = text.replace("[sampling]\n", '[sampling]\nengine = "surrogate"\n', 1)
    text = text.replace("ess_above = 2000", "ess_above = 500")
    text = text.replace("steps = 2000", "steps = 400")          # the surrogate chain's length
    text += (f'\n[output]\nchain = "{tmp_path / "eng.h5"}"\n\n'
             "[surrogate]\nround_size = 128\nbatch = 16\nevidence_draws = 20000\n")
    path = tmp_path / "eng.toml"
    path.write_text(text)
    return path


@pytest.mark.slow
def test_weighted_sample_keeps_its_weights_and_an_equal_weight_resample(tmp_path, capsys):
    assert main(["--quiet", "run", str(_engine_run_file(tmp_path))]) == 0
    chain = tmp_path / "eng.h5"
    run = load_run(chain)
    ws = run.kept
    cons, info = weighted_constraints(ws)
    assert main(["--quiet", "export", str(chain), str(tmp_path / "eng.nc")]) == 0
    assert main(["--quiet", "export", str(chain), str(tmp_path / "eng.csv")]) == 0
    idata = az.from_netcdf(tmp_path / "eng.nc")                    # reference: ArviZ (PyPI)
    ex = idata["exact_weighted"]
    assert np.array_equal(ex["weight"].values, ws.weights) and np.array_equal(ex["a_1"].values, ws.column("a_1"))
    assert ex.attrs["ln_evidence"] == pytest.approx(run.report["ln_z"])
    post = idata.posterior
    assert post.attrs["resampled"] == 1 and "meaningless" in post.attrs["meaning"]
    m = post.sizes["draw"]
    assert post.sizes["chain"] == 1 and m == round(ws.ess)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        summ = az.summary(idata, kind="stats", round_to="none")      # reference: ArviZ (PyPI)
    for c in cons:
        # the resample's mean scatters about the weighted mean by about its sd/√M on top of the weighted
        # estimate's own error: within 4 σ of both combined
        tol = 4 * math.hypot(c.mcse["mean"], c.sd / math.sqrt(m))
        assert abs(summ.loc[c.name, "mean"] - c.mean) < tol, c.name
        assert summ.loc[c.name, "sd"] == pytest.approx(c.sd, rel=4 / math.sqrt(m))
    data = np.loadtxt(tmp_path / "eng.csv", delimiter=",")             # reference: numpy.loadtxt
    assert data[:, 0].sum() == pytest.approx(1.0, abs=1e-12)
    for i, c in enumerate(cons):
        assert data[:, 0] @ data[:, 2 + i] == pytest.approx(c.mean, rel=1e-12)
    err = _one_line_error(capsys, main(["--quiet", "export", str(chain), str(tmp_path / "b.nc"), "--burn", "5"]))
    assert "surrogate" in err and not (tmp_path / "b.nc").exists()
