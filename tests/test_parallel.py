"""Parallel runs give the serial chain value for value: local process pools, and MPI under ``mpiexec``.

The reference for every comparison is a serial run (``workers = 0``, the posterior in the driver process)
of the same run file and seed. The claim tested is bitwise equality of every stored draw (positions,
ln posterior, ln likelihood, derived values) and of the random state after the last step: parallel
evaluation changes who computes a point, never which point is computed or what is done with the result.
The model is the exactly solvable template theory, so each MPI launch costs seconds. MPI runs go through
the real command line, ``mpiexec -n N python -m infer run RUNFILE``, in a subprocess with a hard timeout
that kills the whole process tree, so a broken protocol fails the test instead of hanging CI.
"""
from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from infer.parallel import mpi
from infer.cli import main
from infer.errors import EXIT_OK, EXIT_PAUSED, EXIT_USAGE
from infer.store.chainfile import ChainStore

from conftest import quick_config_text

REPO = Path(__file__).resolve().parents[1]
LAUNCH_TIMEOUT = 240          # seconds; a launch normally takes 5–15 s on a 2-core machine
DRAWS = ("position", "log_post", "log_like", "derived")


# -- helpers ---------------------------------------------------------------------------------------------
def find_mpiexec() -> str:
    pytest.importorskip("mpi4py", reason="MPI tests need the [mpi] or [test] extra (mpi4py and mpich)")
    exe = (shutil.which("mpiexec", path=os.path.dirname(sys.executable)) or shutil.which("mpiexec"))
    if exe is None:
        pytest.fail("mpi4py is installed but no mpiexec was found beside the Python executable or on PATH "
                    "(pip install mpich)")
    return exe


def _env() -> dict:
    """This process's environment without any MPI launcher variables, with this checkout importable."""
    env = {k: v for k, v in os.environ.items()
           if not k.startswith(("PMI_", "PMIX_", "OMPI_", "MPI_LOCAL", "HYDRA_", "HYDI_"))}
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), env.get("PYTHONPATH")]))
    return env


def _descendants(pid: int) -> list[int]:
    children: dict[int, list[int]] = {}
    for entry in Path("/proc").iterdir() if Path("/proc").is_dir() else ():
        if entry.name.isdigit():
            try:
                ppid = int((entry / "stat").read_text().rsplit(")", 1)[1].split()[1])
            except (OSError, IndexError, ValueError):
                continue
            children.setdefault(ppid, []).append(int(entry.name))
    out, todo = [], [pid]
    while todo:
        for c in children.get(todo.pop(), []):
            out.append(c)
            todo.append(c)
    return out


def _kill_tree(proc: subprocess.Popen) -> None:
    for pid in _descendants(proc.pid):
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    proc.kill()


def mpi_command(n: int, *args: str) -> list[str]:
    return [find_mpiexec(), "-n", str(n), sys.executable, "-m", "infer", *args]


def finish(proc: subprocess.Popen, what: str) -> tuple[int, str, str]:
    try:
        out, err = proc.communicate(timeout=LAUNCH_TIMEOUT)
    except subprocess.TimeoutExpired:
        _kill_tree(proc)
        out, err = proc.communicate()
        pytest.fail(f"{what} did not finish within {LAUNCH_TIMEOUT} s (killed); stderr:\n{err[-3000:]}")
    return proc.returncode, out, err


def launch(n: int, *args: str) -> tuple[int, str, str]:
    proc = subprocess.Popen(mpi_command(n, *args), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=_env(), cwd=str(REPO))
    return finish(proc, f"mpiexec -n {n} infer {' '.join(args)}")


def assert_same_chain(path_a: Path, path_b: Path) -> None:
    a, b = ChainStore(str(path_a)).read(), ChainStore(str(path_b)).read()
    assert a.steps_done == b.steps_done
    for name in DRAWS:
        assert np.array_equal(getattr(a.samples, name), getattr(b.samples, name)), name
    for ra, rb in zip(a.rng, b.rng):                   # and the random state to continue from
        assert np.array_equal(ra[1], rb[1]) and ra[2:] == rb[2:]


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return tmp_path_factory.mktemp("parallel")


def write(folder: Path, quick_data: Path, name: str, **options) -> tuple[Path, Path]:
    chain = folder / "chains" / f"{name}.h5"
    path = folder / f"{name}.toml"
    path.write_text(quick_config_text(quick_data, chain, **options))
    return path, chain


STEPS, SEED = 30, 9


@pytest.fixture(scope="module")
def serial_chain(folder, quick_data):
    """The reference: STEPS steps with the posterior evaluated in the driver process."""
    cfg, chain = write(folder, quick_data, "serial", steps=STEPS, seed=SEED, workers=0)
    assert main(["--quiet", "run", str(cfg)]) == EXIT_OK
    return chain


# -- local process pools ---------------------------------------------------------------------------------
@pytest.mark.slow
def test_pool_of_three_equals_serial(folder, quick_data, serial_chain):
    cfg, chain = write(folder, quick_data, "pool3", steps=STEPS, seed=SEED, workers=3)
    assert main(["--quiet", "run", str(cfg)]) == EXIT_OK
    assert_same_chain(serial_chain, chain)


# -- threads per evaluation ------------------------------------------------------------------------------
def test_threads_never_depend_on_the_worker_count_and_oversubscription_is_found(monkeypatch):
    """CAMB's spectra differ in the last bits between OpenMP thread counts (benchmarks/bench_parallel.py checks
    it), so the thread count per evaluation must not follow the number of workers or ranks."""
    from infer.parallel import threads_for
    assert threads_for(1) == threads_for(2) == threads_for(64) == 1
    assert threads_for(64, requested=4) == 4                             # [sampling] threads_per_worker
    # rank 0 (driver, not counted) and ranks 1–3 share node a's 8 cores; rank 4 has node b's 4 cores;
    # ranks 5 and 6 are bound by the scheduler to 2 cores each on node c.
    layout = [("a", tuple(range(8)))] * 4 + [("b", tuple(range(4))), ("c", (0, 1)), ("c", (2, 3))]
    monkeypatch.setitem(mpi._state, "layout", layout)
    assert mpi.oversubscribed(1) == mpi.oversubscribed(2) == []
    assert mpi.oversubscribed(3) == ["3 ranks × 3 threads on 8 cores of a", "1 rank × 3 threads on 2 cores of c",
                                     "1 rank × 3 threads on 2 cores of c"]
    monkeypatch.setitem(mpi._state, "layout", [("a", (0, 1))] * 4)       # mpiexec -n 4 on 2 cores
    assert mpi.oversubscribed(1) == ["3 ranks × 1 thread on 2 cores of a"]


# -- MPI -------------------------------------------------------------------------------------------------
@pytest.mark.slow
def test_mpi_two_ranks_equal_serial(folder, quick_data, serial_chain):
    """Default isolation (the theory in a worker process per rank); other commands run on rank 0 only."""
    cfg, chain = write(folder, quick_data, "mpi2", steps=STEPS, seed=SEED, workers=1)
    code, out, err = launch(2, "run", str(cfg))
    assert code == EXIT_OK, err
    assert "1 rank evaluates" in err
    assert_same_chain(serial_chain, chain)
    code, out, err = launch(2, "status", str(chain))
    assert code == EXIT_OK, err
    assert out.count(f"steps     {STEPS} of up to {STEPS}") == 1, out


@pytest.mark.slow
def test_mpi_three_ranks_equal_serial(folder, quick_data, serial_chain):
    cfg, chain = write(folder, quick_data, "mpi3", steps=STEPS, seed=SEED, workers=0)
    code, out, err = launch(3, "run", str(cfg))
    assert code == EXIT_OK, err
    assert "2 ranks evaluate" in err
    assert_same_chain(serial_chain, chain)


@pytest.mark.slow
def test_resume_across_mpi_sizes_and_serial(folder, quick_data, serial_chain):
    """Start on 3 ranks, continue on 2 ranks, finish serially: the serial chain, value for value."""
    cfg, chain = write(folder, quick_data, "mixed", steps=STEPS, seed=SEED, workers=0)
    code, _, err = launch(3, "run", str(cfg), "--steps", "11")
    assert code == EXIT_OK, err
    code, _, err = launch(2, "resume", str(chain), "--steps", "20")
    assert code == EXIT_OK, err
    assert ChainStore(str(chain)).read().steps_done == 20
    assert main(["--quiet", "resume", str(chain), "--workers", "2"]) == EXIT_OK
    assert_same_chain(serial_chain, chain)


@pytest.mark.slow
def test_mpi_theory_crash_costs_one_point(folder, quick_data):
    """A segfaulting theory (fault injection) under MPI with isolated theory processes: each crash gives
    that point ln p = −∞ and a fresh process, the job goes on, and the chain equals a serial run in which
    the same points are refused by an ordinary error instead."""
    fault = 'fault = {{ parameter = "a_1", above = 1.14, action = "{}" }}'
    cfg, chain = write(folder, quick_data, "crash", steps=12, seed=SEED, workers=1,
                       theory_extra=fault.format("segfault"))
    code, _, err = launch(3, "run", str(cfg))
    assert code == EXIT_OK, err
    ref_cfg, ref_chain = write(folder, quick_data, "crash_ref", steps=12, seed=SEED, workers=0,
                               theory_extra=fault.format("error"))
    assert main(["--quiet", "run", str(ref_cfg)]) == EXIT_OK
    assert_same_chain(ref_chain, chain)
    got, ref = ChainStore(str(chain)).read(), ChainStore(str(ref_chain)).read()
    crashes = ref.rejections["injected-fault"]
    assert crashes >= 2
    assert got.rejections.get("theory-process-died") == crashes == len(got.failures)
    assert all(f["how"] == "signal 11" and f["point"][0] > 1.14 for f in got.failures)


def test_mpi_bad_input_is_one_line_and_exit_2(folder, quick_data):
    cfg, chain = write(folder, quick_data, "bad", steps=5, workers=0)
    cfg.write_text(cfg.read_text().replace(str(quick_data), str(folder / "no_such_bandpowers.h5")))
    code, out, err = launch(3, "run", str(cfg))
    assert code == EXIT_USAGE
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("infer: error:") and "no_such_bandpowers.h5" in lines[0], err
    assert not chain.exists()


def test_mpi_command_line_error_is_one_line_not_one_per_rank(folder):
    code, out, err = launch(3, "check", str(folder / "x.toml"), "--calls", "0")
    assert code == EXIT_USAGE
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("infer: error:") and "--calls" in lines[0], err


def _steps_in(chain: Path) -> int:
    import h5py
    try:
        with h5py.File(chain, "r", locking=False) as f:
            return int(f.attrs["steps_done"])
    except (OSError, KeyError):
        return -1


@pytest.mark.slow
def test_sigterm_to_mpiexec_pauses_with_75_and_resumes_exactly(folder, quick_data):
    """The scheduler's SIGTERM goes to mpiexec, which forwards it to every rank's process group (the rank's
    isolated theory process included). Rank 0 abandons the step in flight, checkpoints, collects the points
    still out and releases the ranks; the chain is consistent and continues as if never stopped."""
    # Slow enough (5 ms per point) that the signal lands while points are in flight on the ranks.
    cfg, chain = write(folder, quick_data, "term", steps=100000, seed=4, workers=1, checkpoint_steps=5,
                       theory_extra="delay_seconds = 0.005")
    proc = subprocess.Popen(mpi_command(3, "run", str(cfg)), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=_env(), cwd=str(REPO))
    deadline = time.monotonic() + LAUNCH_TIMEOUT
    while _steps_in(chain) < 5 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.1)
    assert proc.poll() is None, proc.communicate()[1]
    proc.send_signal(signal.SIGTERM)
    code, _, err = finish(proc, "the MPI run after SIGTERM")
    assert code == EXIT_PAUSED, err
    assert "Traceback" not in err, err
    state = ChainStore(str(chain)).read()
    stopped = state.steps_done
    assert stopped >= 5
    assert state.samples.meta["stop_reason"] == "signal SIGTERM"
    assert state.failures == []            # the signal killed theory processes; that is no theory failure
    assert np.isfinite(state.samples.log_post).all()
    # Resume under MPI for a few steps, then serially; compare with one uninterrupted serial run.
    code, _, err = launch(2, "resume", str(chain), "--steps", str(stopped + 3))
    assert code == EXIT_OK, err
    assert main(["--quiet", "resume", str(chain), "--steps", str(stopped + 6), "--workers", "0"]) == EXIT_OK
    ref_cfg, ref_chain = write(folder, quick_data, "term_ref", steps=stopped + 6, seed=4, workers=0)
    assert main(["--quiet", "run", str(ref_cfg)]) == EXIT_OK
    assert_same_chain(ref_chain, chain)


# -- the Slurm job script --------------------------------------------------------------------------------
@pytest.mark.slow
def test_slurm_job_script_runs_then_resubmits_then_resumes(folder, quick_data, tmp_path):
    """configs/slurm_job.sh with stand-ins for squeue (time left) and sbatch (records the resubmission).
    Job 1 has a 10 s budget for a run that needs at least 9.6 s of theory time after start-up, so it must
    pause (75) and resubmit itself; job 2 has ample time, resumes and finishes (0) without resubmitting.
    The chain equals one uninterrupted serial run."""
    steps = 120                      # 120 steps × 32 points × 5 ms / 2 ranks = 9.6 s of theory time
    cfg, chain = write(folder, quick_data, "slurm", steps=steps, seed=SEED, workers=0, checkpoint_steps=5,
                       theory_extra="delay_seconds = 0.005")
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    left, submitted = tmp_path / "left", tmp_path / "submitted"
    (bin_dir / "squeue").write_text(f'#!/bin/sh\ncat "{left}"\n')
    (bin_dir / "sbatch").write_text(f'#!/bin/sh\necho "$@" >> "{submitted}"\necho "Submitted batch job 2"\n')
    for exe in bin_dir.iterdir():
        exe.chmod(0o755)
    env = _env() | {"PATH": f"{bin_dir}{os.pathsep}{os.environ.get('PATH', '')}", "SLURM_JOB_ID": "1",
                    "SLURM_SUBMIT_DIR": str(folder), "INFER": f"{sys.executable} -m infer",
                    "MPIEXEC": f"{find_mpiexec()} -n 3", "INFER_MARGIN": "5"}
    script = REPO / "configs" / "slurm_job.sh"

    def job(time_left, count):
        left.write_text(time_left + "\n")
        proc = subprocess.Popen(["bash", str(script), str(cfg), str(chain)], stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True, env=env | {"INFER_JOB_COUNT": str(count)})
        return finish(proc, f"slurm_job.sh (job {count})")

    code, out, err = job("0:15", 1)                       # 15 s left − 5 s margin = --time-limit 10
    assert code == EXIT_PAUSED, out + err
    assert f" run {cfg} --chain {chain} --time-limit 10 " in out
    calls = submitted.read_text().splitlines()
    assert calls == [f"--dependency=afterany:1 --export=ALL,INFER_JOB_COUNT=2 {script} {cfg} {chain}"]
    paused_at = ChainStore(str(chain)).read().steps_done
    assert 0 < paused_at < steps

    code, out, err = job("10:00", 2)
    assert code == EXIT_OK, out + err
    assert f" resume {chain} --time-limit 595 " in out
    assert f"steps {paused_at} -> {steps}" in out
    assert len(submitted.read_text().splitlines()) == 1     # finished: no further job

    ref_cfg, ref_chain = write(folder, quick_data, "slurm_ref", steps=steps, seed=SEED, workers=0)
    assert main(["--quiet", "run", str(ref_cfg)]) == EXIT_OK
    assert_same_chain(ref_chain, chain)
