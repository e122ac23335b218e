"""Any log-density runs serially, in the process pool and under MPI unchanged, with the same numbers.

The evaluators take a picklable factory, not a run file (issue 8): here a plain Gaussian defined in this
module — no dataset, no theory — goes through `InProcess`, `ProcessPool` (2 workers) and `MPIEvaluator`
(``mpiexec -n 3``: rank 0 and two evaluating ranks), and every result must be equal bit for bit and placed
by point index. The Gaussian's values are checked against `scipy.stats.multivariate_normal.logpdf`
(the reference library), so the comparison is of right numbers, not merely equal ones. Also: each
process builds the density once; a crashing density costs one point; a set-up error is one line; and
`infer.parallel` imports nothing of the model.
"""
from __future__ import annotations

import math
import os
import subprocess
import sys
import textwrap
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from infer.errors import UserError
from infer.parallel import DIED, InProcess, ProcessPool, make_evaluator

TESTS = Path(__file__).resolve().parent
_BUILDS = {"n": 0}                     # builds of a density in this process


class Gaussian:
    """ln N(x; μ, diag σ²), blob = [ln p, r², builds of a density in this process]; points with
    r² > 30 are refused (reason "far"), and a first coordinate equal to ``crash_at`` kills the process."""

    blob_names = ("log_like", "r2", "builds")

    def __init__(self, mean, sd, crash_at):
        self.mean, self.sd, self.crash_at = np.array(mean), np.array(sd), crash_at
        self.lognorm = float(np.sum(np.log(self.sd)) + 0.5 * len(self.sd) * math.log(2 * math.pi))

    def __call__(self, x):
        x = np.asarray(x, float)
        if self.crash_at is not None and x[0] == self.crash_at:
            os._exit(7)
        z = (x - self.mean) / self.sd
        r2 = float(z @ z)
        if r2 > 30:
            return -math.inf, np.full(3, np.nan), "far"
        lp = -0.5 * r2 - self.lognorm
        return lp, np.array([lp, r2, _BUILDS["n"]]), None


@dataclass(frozen=True)
class GaussianFactory:
    mean: tuple = (0.5, -1.0, 2.0)
    sd: tuple = (1.0, 0.3, 2.5)
    crash_at: float | None = None
    fail: str = ""

    def __call__(self) -> Gaussian:
        if self.fail:
            raise UserError(self.fail)
        _BUILDS["n"] += 1
        return Gaussian(self.mean, self.sd, self.crash_at)


def points(n=23, seed=3) -> np.ndarray:
    f = GaussianFactory()
    x = np.array(f.mean) + np.array(f.sd) * np.random.default_rng(seed).normal(size=(n, 3)) * 1.5
    x[5] = [40.0, 0.0, 0.0]                       # refused: "far"
    return x


def test_gaussian_matches_scipy():
    f = GaussianFactory()
    density = f()
    x = points()
    ref = stats.multivariate_normal(mean=f.mean, cov=np.diag(np.square(f.sd))).logpdf(x)
    lp = np.array([density(p)[0] for p in x])
    ok = np.isfinite(lp)
    assert ok.sum() == len(x) - 1 and not ok[5]
    assert np.allclose(lp[ok], ref[ok], rtol=1e-12, atol=0)


def _same(a, b):
    assert np.array_equal(a[0], b[0])                              # ln p, −∞ included
    assert np.array_equal(a[1][:, :2], b[1][:, :2], equal_nan=True)  # blob, bit for bit
    assert a[2] == b[2]                                            # reasons, by point index


def test_in_process_and_pool_agree_bit_for_bit():
    x = points()
    serial = InProcess(GaussianFactory()()).evaluate(x)
    with ProcessPool(GaussianFactory(), 2) as pool:
        assert pool.blob_names == Gaussian.blob_names
        pooled = pool.evaluate(x)
        again = pool.evaluate(x[::-1])
    _same(serial, pooled)
    assert np.array_equal(again[0], pooled[0][::-1])
    assert np.all(pooled[1][np.isfinite(pooled[0]), 2] == 1)       # each worker built the density once
    assert serial[2][5] == "far"
    # make_evaluator chooses the same evaluators (outside MPI)
    with make_evaluator(GaussianFactory(), workers=0) as ev:
        _same(serial, ev.evaluate(x))


def test_a_crash_in_the_pool_costs_one_point():
    x = points()
    x[2, 0] = x[9, 0] = 4.5
    with ProcessPool(GaussianFactory(crash_at=4.5), 2) as pool:
        lp, blobs, reasons = pool.evaluate(x)
        assert [r for r in reasons if r == DIED] == [DIED, DIED] and reasons[2] == reasons[9] == DIED
        assert len(pool.failures) == 2 and pool.replaced == 2
    ref = InProcess(GaussianFactory()()).evaluate(x)
    keep = [i for i in range(len(x)) if i not in (2, 9)]
    assert np.array_equal(lp[keep], ref[0][keep])


def test_pool_set_up_error_is_one_line():
    with pytest.raises(UserError, match="^no such table$"):
        ProcessPool(GaussianFactory(fail="no such table"), 1)


def test_parallel_imports_nothing_of_the_model():
    code = ("import sys\nimport infer.parallel, infer.parallel.mpi, infer.parallel.pool\n"
            "bad = [m for m in sys.modules if m.startswith(('infer.model', 'infer.theory', 'infer.config'))]\n"
            "assert not bad, bad")
    subprocess.run([sys.executable, "-c", code], check=True)


MPI_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
import numpy as np
from infer.parallel import mpi
from test_evaluators import GaussianFactory, points


def main():
    if not mpi.is_root():
        return mpi.serve()
    try:
        x = points()
        out = {{}}
        for name, factory, isolate in (("first", GaussianFactory(), False), ("equal", GaussianFactory(), False),
                                       ("isolated", GaussianFactory(), True)):
            ev = mpi.MPIEvaluator(factory, isolate=isolate)
            lp, blobs, reasons = ev.evaluate(x)
            ev.close()
            out[name + "_lp"], out[name + "_blobs"] = lp, blobs
            out[name + "_reasons"] = np.array([r or "" for r in reasons])
        np.savez({out!r}, **out)
    finally:
        mpi.shutdown()
    return 0


if __name__ == "__main__":          # spawned worker processes import this file too
    sys.exit(main())
"""


@pytest.mark.slow
def test_mpi_three_ranks_agree_bit_for_bit_and_keep_an_equal_factory(tmp_path):
    from test_parallel import _env, find_mpiexec, finish
    script, out = tmp_path / "mpi_gauss.py", tmp_path / "mpi_gauss.npz"
    script.write_text(textwrap.dedent(MPI_SCRIPT.format(tests=str(TESTS), out=str(out))))
    proc = subprocess.Popen([find_mpiexec(), "-n", "3", sys.executable, str(script)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=_env(), cwd=str(tmp_path))
    code, _, err = finish(proc, "mpiexec -n 3 (Gaussian factory)")
    assert code == 0, err
    got = np.load(out)
    serial = InProcess(GaussianFactory()()).evaluate(points())
    for name in ("first", "equal", "isolated"):
        reasons = [r or None for r in got[name + "_reasons"].tolist()]
        _same(serial, (got[name + "_lp"], got[name + "_blobs"], reasons))
    ok = np.isfinite(got["first_lp"])
    # An equal factory in the next session is not rebuilt: still the first build on each rank.
    assert np.all(got["first_blobs"][ok, 2] == 1) and np.all(got["equal_blobs"][ok, 2] == 1)
    assert np.all(got["isolated_blobs"][ok, 2] == 1)              # built once in each rank's worker
