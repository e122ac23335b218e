"""The surrogate engine's exact calls run in this process, in a local pool and on MPI ranks: same answer.

The claim (issue 9): the exact-call batches of a surrogate-engine run may be computed by any evaluator —
in the driver process (``workers = 0``), by a local pool of isolated worker processes, or by MPI ranks
(isolated per rank or inside the ranks) — and the chain file is the same value for value: every dataset of
its ``/exact`` group (the replay log: points, ln posterior, blobs, stages, reasons) and of its ``/sample``
group (the weighted sample and its report, wall-clock seconds aside). The reference is the ``workers = 0``
run of the same run file and seed. The model is the exactly solvable template theory, and the weighted
sample is also checked against its closed-form posterior (Gelman et al. 2013, Bayesian Data Analysis, 3rd
ed., §14.2: Σ = (AᵀC⁻¹A)⁻¹, μ = Σ AᵀC⁻¹d for flat priors; Monte Carlo error from the weight ESS, Kish
1965), so the runs agree on the right answer and not on a broken one. MPI runs go through the real
command line under ``mpiexec`` (helpers of `test_parallel`), with a hard timeout.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import h5py
import numpy as np
import pytest

from infer.cli import main
from infer.errors import EXIT_OK
from infer.store.hdf5io import get_json

from conftest import analytic_posterior, quick_config_text
from test_parallel import launch

pytestmark = pytest.mark.slow

TIMING = ("seconds",)              # report fields that measure wall-clock time, not the answer
JSON_TEXT = ("reasons", "report")  # datasets holding JSON text (UTF-8 bytes); the others are arrays


def engine_config(folder: Path, data: Path, name: str, workers: int) -> tuple[Path, Path]:
    chain = folder / "chains" / f"{name}.h5"
    text = quick_config_text(data, chain, workers=workers)
    text = text.replace("[sampling]\n", "[sampling]\nengine = \"surrogate\"\n", 1)
    text = text.replace("ess_above = 1e9", "ess_above = 600")
    text += "\n[surrogate]\nround_size = 128\nbatch = 16\nevidence_draws = 20000\n"
    path = folder / f"{name}.toml"
    path.write_text(text)
    return path, chain


def groups(chain: Path) -> dict:
    """Every dataset of /exact and /sample, as arrays; JSON text decoded, timing fields dropped."""
    out = {}
    with h5py.File(chain, "r", locking=False) as f:
        for group in ("exact", "sample"):
            for key, ds in f[group].items():
                if key not in JSON_TEXT:
                    value = ds[()]
                else:
                    value = get_json(ds)
                    if isinstance(value, dict):
                        value = {k: v for k, v in value.items() if k not in TIMING}
                out[f"{group}/{key}"] = value
    return out


def assert_same(ref: dict, got: dict) -> None:
    assert sorted(ref) == sorted(got)
    for key, a in ref.items():
        b = got[key]
        if isinstance(a, np.ndarray):
            assert a.dtype == b.dtype and a.shape == b.shape, key
            assert np.array_equal(a, b, equal_nan=True), key
        else:
            assert json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True), key


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return tmp_path_factory.mktemp("surrogate_parallel")


@pytest.fixture(scope="module")
def serial(folder, quick_data):
    """The reference: exact calls in the driver process."""
    path, chain = engine_config(folder, quick_data, "serial", workers=0)
    assert main(["--quiet", "run", str(path)]) == EXIT_OK
    return groups(chain)


def test_serial_reference_is_the_closed_form_posterior(serial, quick_data):
    rep = serial["sample/report"]
    assert rep["converged"] and rep["exact_calls"] == len(serial["exact/log_post"])
    w = np.exp(serial["sample/log_weight"] - serial["sample/log_weight"].max())
    w /= w.sum()
    mean, cov = analytic_posterior(quick_data)
    m = w @ serial["sample/position"]
    assert np.all(np.abs(m - mean) < 4 * np.sqrt(np.diag(cov)) / math.sqrt(rep["ess"])), (m, mean)


def test_pool_of_two_equals_serial(folder, quick_data, serial):
    path, chain = engine_config(folder, quick_data, "pool2", workers=2)
    assert main(["--quiet", "run", str(path)]) == EXIT_OK
    assert_same(serial, groups(chain))


@pytest.mark.parametrize("workers", [1, 0], ids=["isolated", "in-rank"])
def test_mpi_three_ranks_equal_serial(folder, quick_data, serial, workers):
    path, chain = engine_config(folder, quick_data, f"mpi3_w{workers}", workers=workers)
    code, out, err = launch(3, "run", str(path))
    assert code == EXIT_OK, err
    assert "2 ranks evaluate" in err, err
    assert_same(serial, groups(chain))
