"""Chains that survive anything: hard kills, pre-emption, wall time, live readers, a second writer, damaged
files, full disks, read-only folders and theory codes that kill their own process.

The reference for every "exact" claim is the same run left uninterrupted, compared value for value (every
stored position, ln posterior, ln likelihood and derived quantity, plus rejection counts and convergence
rows). External references: the lookup3 hash that checks HDF5 metadata is tested against the published
values of its author's reference program (B. Jenkins, lookup3.c, 2006, self-test driver) and against the
checksums HDF5 itself writes (through h5py). The model is the exactly solvable template theory of
tests/conftest.py, with its fault injection and ``delay_seconds`` standing in for a slow, crashing
Boltzmann code.

Runs go through the command line in subprocesses (``python -m infer``) wherever signals, kills or a second
process are the point. Only the SIGTERM/time-limit bounds look at the clock, with margins of many seconds.
Figures (kills, reads, seconds from SIGTERM to exit) are printed; run ``pytest -s`` to see them.
"""
from __future__ import annotations

import dataclasses
import errno
import hashlib
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from infer import config
from infer.cli import main
from infer.errors import EXIT_PAUSED, ChainFileError, UserError
from infer.model.posterior import PosteriorFactory
from infer.parallel import InProcess, ProcessPool
from infer.model.posterior import Posterior
from infer.store.salvage import lookup3, salvage
from infer.sampling.driver import Driver
from infer.sampling.start import starting_ball
from infer.store.chainfile import DRAWS, ChainStore

from conftest import quick_config_text

REPO = Path(__file__).resolve().parents[1]
ENV = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))


# -- helpers ---------------------------------------------------------------------------------------------
def infer_cmd(*args):
    return [sys.executable, "-m", "infer", *map(str, args)]


def cli(*args, timeout=300):
    """Run the infer command to completion in a subprocess."""
    return subprocess.run(infer_cmd(*args), env=ENV, capture_output=True, text=True, timeout=timeout)


def spawn(*args, log: Path):
    """Start the infer command in its own process group (so a kill reaches its workers, as a scheduler's
    does); stderr goes to ``log``."""
    with open(log, "a") as err:
        return subprocess.Popen(infer_cmd(*args), env=ENV, stdout=subprocess.DEVNULL, stderr=err,
                                start_new_session=True)


def kill_group(proc, sig=signal.SIGKILL):
    try:
        os.killpg(proc.pid, sig)
    except ProcessLookupError:
        pass
    return proc.wait(timeout=60)


def strays(chain: Path):
    return sorted(chain.parent.glob(f".{chain.name}.tmp-*"))


def steps_in(chain: Path) -> int:
    return ChainStore(str(chain)).read().steps_done if chain.exists() else 0


def assert_prefix(state, ref, n=None):
    """``state`` holds exactly the first ``n`` (default: all its) steps of ``ref``."""
    n = state.steps_done if n is None else n
    assert state.steps_done == n
    for k in DRAWS:
        got, want = getattr(state.samples, k), getattr(ref.samples, k)[:n]
        assert got.shape == want.shape, k
        assert np.array_equal(got, want, equal_nan=True), f"{k} differs from the uninterrupted run"


def assert_one_line_error(stderr: str, *needles):
    lines = [ln for ln in stderr.strip().splitlines() if ln.strip()]
    assert "Traceback" not in stderr, stderr
    assert len(lines) == 1, stderr
    assert lines[0].startswith("infer: error: "), stderr
    for n in needles:
        assert n in lines[0], (n, lines[0])
    return lines[0]


def sha256(path: Path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def wait_for(predicate, timeout=120.0, proc=None, what="condition"):
    t = time.monotonic()
    while not predicate():
        if proc is not None and proc.poll() is not None:
            raise AssertionError(f"process ended (code {proc.returncode}) before {what}")
        if time.monotonic() - t > timeout:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.005)


def make_chain_without_running(cfg_path: Path, chain: Path):
    """What ``infer run`` writes before its first step, for a run file whose theory is slow: the starting
    ball is drawn with the same theory minus its ``delay_seconds`` (the delay changes no value), so the
    test does not wait minutes for it. Used to hit a long theory call in the *first* step."""
    slow = config.load(cfg_path)
    theory = {k: v for k, v in slow.theory.items() if k != "delay_seconds"}
    fast = dataclasses.replace(slow, theory=theory)
    post = Posterior(fast)
    start = starting_ball(fast, InProcess(post), post.blob_names)
    provenance = {"config_text": slow.text, "config_path": slow.path, "run_name": slow.name, "seed": slow.seed,
                  "dataset_file": slow.dataset["file"], "dataset_sha256": post.data.sha256,
                  "experiment": post.data.experiment, "model": json.dumps(post.describe(), default=str),
                  "versions": "{}", "host": "test"}
    ChainStore(str(chain)).create(names=post.names, derived_names=post.derived_names, tex={},
                                  bounds=post.priors.bounds, start=start, provenance=provenance)
    return slow


def children_of(pid: int) -> list[int]:
    try:
        text = Path(f"/proc/{pid}/task/{pid}/children").read_text()
    except OSError:
        return []
    return [int(c) for c in text.split()]


def alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return False
    return state != "Z"


# -- 1. hard kills at random moments, then exact resume ------------------------------------------------
@pytest.mark.slow
def test_sigkill_at_random_moments_then_resume_gives_the_uninterrupted_chain(write_config):
    """12 SIGKILLs of the whole process group (what a scheduler does): 4 at a random time in the first
    1.2 s after launch (start-up, lock, starting ball, reading the chain), 4 at a random time 0–0.5 s after
    the attempt's first checkpoint was published (mid-step or mid-checkpoint), 4 the instant a checkpoint's
    temporary copy appears (mid-checkpoint). After every kill the chain file opens and holds exactly a
    prefix of the uninterrupted chain; resuming after the last kill ends with a chain identical to it in
    every stored number."""
    opts = dict(steps=100, walkers=8, ensembles=2, workers=0, seed=23, check_every=40,
                theory_extra="delay_seconds = 0.002")
    # The reference checkpoints once at the end: checkpoint spacing must not change any value either.
    ref_cfg, ref_chain = write_config("straight.toml", checkpoint_steps=1000, **opts)
    cfg, chain = write_config("killed.toml", checkpoint_steps=2, **opts)
    assert main(["--quiet", "run", str(ref_cfg)]) == 0
    ref = ChainStore(str(ref_chain)).read()
    rnd = random.Random(20250611)
    log = chain.parent.parent / "killed.log"
    kills = []
    for mode in ["start-up", "running", "mid-checkpoint"] * 4:
        before = steps_in(chain)
        ino = chain.stat().st_ino if chain.exists() else None
        args = ("resume", chain) if chain.exists() else ("run", cfg)
        proc = spawn("--quiet", *args, log=log)

        def published():
            try:
                return chain.stat().st_ino != ino          # every checkpoint is a new file (new inode)
            except FileNotFoundError:
                return False

        if mode == "start-up":
            time.sleep(rnd.uniform(0.05, 1.2))
        else:
            wait_for(published, proc=proc, what="a checkpoint")
            if mode == "running":
                time.sleep(rnd.uniform(0.0, 0.5))
            else:
                wait_for(lambda: strays(chain), timeout=60, proc=proc, what="a checkpoint copy")
        assert proc.poll() is None, "the run ended before it could be killed"
        kill_group(proc)
        mid_commit = any(p.name.endswith(f".tmp-{proc.pid}") for p in strays(chain))   # its own copy
        after = steps_in(chain)                             # the file opens and is consistent ...
        if chain.exists():
            assert_prefix(ChainStore(str(chain)).read(), ref)   # ... and is a prefix of the reference
        assert after >= before
        kills.append({"mode": mode, "steps_before": before, "steps_after": after, "mid_commit": mid_commit})
    assert len(kills) >= 10
    r = cli("--quiet", "resume", chain)
    assert r.returncode == 0, r.stderr
    assert "cleared a stale lock" in r.stderr                  # the last kill left its lock behind
    final = ChainStore(str(chain)).read()
    assert final.steps_done == ref.steps_done == 100
    assert_prefix(final, ref)
    assert final.rejections == ref.rejections
    for k in ref.convergence:
        assert np.array_equal(final.convergence[k], ref.convergence[k], equal_nan=True), k
    assert not strays(chain) and not Path(str(chain) + ".lock").exists()
    landed = sum(k["mid_commit"] for k in kills)
    print(f"\nSIGKILL test: {len(kills)} kills, {landed} landed inside a checkpoint write (a temporary copy "
          f"was left), steps at each kill: {[k['steps_after'] for k in kills]}; final chain identical to "
          "the uninterrupted run")
    assert landed >= 1, kills


# -- 2. live readers -----------------------------------------------------------------------------------
@pytest.mark.slow
def test_readers_in_another_process_always_see_a_consistent_prefix(write_config, tmp_path):
    """While `infer run` checkpoints after every step, this process reads the chain ≥ 200 times (and runs
    `infer status` and `infer summarize`): every read is self-consistent, free of NaN rows, never shorter
    than the previous one, and a prefix of the final chain. SIGINT then pauses the run (exit 75)."""
    cfg, chain = write_config("live.toml", steps=100000, walkers=8, ensembles=2, workers=0, seed=31,
                              checkpoint_steps=1, check_every=100000, theory_extra="delay_seconds = 0.002")
    proc = spawn("--quiet", "run", cfg, log=tmp_path / "live.log")
    try:
        wait_for(chain.exists, proc=proc, what="the chain file")
        reads, lengths, clis = [], [], []
        t0 = time.monotonic()
        while len(reads) < 200 or len(set(lengths)) < 20 or "summarize" not in clis:
            st = ChainStore(str(chain)).read()
            T = st.steps_done
            for k in DRAWS:
                arr = getattr(st.samples, k)
                assert arr.shape[0] == T, (k, arr.shape, T)
                assert not np.isnan(arr).any(), f"NaN in {k} at read {len(reads)}"
            assert not lengths or T >= lengths[-1], "the chain shrank"
            reads.append(st)
            lengths.append(T)
            cmd = None
            if len(reads) in (50, 150):
                cmd = ("status", chain)
            elif len(reads) >= 100 and T >= 8 and "summarize" not in clis:
                cmd = ("summarize", chain, "--no-model", "--out", tmp_path / "summary")
            if cmd:
                r = cli(*cmd)
                assert r.returncode == 0, r.stderr
                clis.append(cmd[0])
            assert time.monotonic() - t0 < 300, "the writer made too little progress"
        assert proc.poll() is None
        os.killpg(proc.pid, signal.SIGINT)
        assert proc.wait(timeout=60) == EXIT_PAUSED
    finally:
        if proc.poll() is None:
            kill_group(proc)
    final = ChainStore(str(chain)).read()
    assert final.samples.meta["stop_reason"] == "signal SIGINT"
    for st in reads:
        assert_prefix(st, final)
    print(f"\nlive readers: {len(reads)} reads in {time.monotonic() - t0:.1f} s saw {len(set(lengths))} "
          f"different lengths (0–{lengths[-1]} steps), all consistent prefixes; CLI readers: {clis}")


# -- 3. SIGTERM during a long theory call, and the wall-time budget -------------------------------------------
@pytest.mark.slow
@pytest.mark.parametrize("workers", [1, 0])
def test_sigterm_during_a_20_second_theory_call_pauses_within_seconds(write_config, tmp_path, workers):
    """The first step's first theory call sleeps 20 s; SIGTERM arrives during it. The run abandons the
    step, writes a consistent checkpoint and exits 75 well before the call could have finished."""
    cfg, chain = write_config(f"slow{workers}.toml", steps=50, walkers=8, ensembles=1, workers=workers, seed=41,
                              theory_extra="delay_seconds = 20.0")
    make_chain_without_running(cfg, chain)
    proc = spawn("resume", chain, log=tmp_path / "slow.log")
    try:
        wait_for(lambda: Path(str(chain) + ".lock").exists(), proc=proc, what="the lock")
        time.sleep(6.0 if workers else 3.0)        # worker started, first call (20 s) under way
        assert proc.poll() is None
        kids = children_of(proc.pid)
        t = time.monotonic()
        os.killpg(proc.pid, signal.SIGTERM)
        code = proc.wait(timeout=60)
        elapsed = time.monotonic() - t
    finally:
        if proc.poll() is None:
            kill_group(proc)
    log = (tmp_path / "slow.log").read_text()
    assert code == EXIT_PAUSED, log
    assert elapsed < 10.0, f"{elapsed:.1f} s from SIGTERM to exit"          # waiting would take ≥ 14 s
    assert "Traceback" not in log and "paused after 0 steps (signal SIGTERM)" in log, log
    st = ChainStore(str(chain)).read()
    assert st.steps_done == 0 and st.samples.meta["stop_reason"] == "signal SIGTERM"
    assert [e["event"] for e in st.events] == ["resume", "stop"]
    wait_for(lambda: not any(alive(k) for k in kids), timeout=10, what="the workers to go")
    print(f"\nSIGTERM with workers={workers}: exit {code} {elapsed:.2f} s after the signal, 20-s call abandoned")


@pytest.mark.slow
def test_time_limit_pauses_cleanly_and_the_run_resumes(write_config):
    cfg, chain = write_config("budget.toml", steps=100000, walkers=8, ensembles=2, workers=0, seed=43,
                              checkpoint_steps=1000, theory_extra="delay_seconds = 0.002")
    t = time.monotonic()
    r = cli("run", cfg, "--time-limit", "4")
    elapsed = time.monotonic() - t
    assert r.returncode == EXIT_PAUSED, r.stderr
    assert "paused after" in r.stderr and "(time-limit)" in r.stderr
    st = ChainStore(str(chain)).read()
    assert st.steps_done > 0 and st.samples.meta["stop_reason"] == "time-limit"
    assert elapsed < 4 + 30
    r = cli("--quiet", "resume", chain, "--steps", st.steps_done + 5)
    assert r.returncode == 0, r.stderr
    assert steps_in(chain) == st.steps_done + 5
    print(f"\n--time-limit 4: stopped after {st.steps_done} steps, process ended {elapsed:.1f} s after start")


@pytest.mark.slow
def test_time_limit_abandons_a_theory_call_that_would_overrun_it(write_config, tmp_path):
    """Library level: a 30-s theory call in a worker and a 4-s budget; the driver gives up the call and
    checkpoints instead of overrunning the budget by 26 s."""
    cfg_path, chain = write_config("overrun.toml", steps=10, walkers=8, ensembles=1, workers=1, seed=47,
                                   theory_extra="delay_seconds = 30.0")
    cfg = make_chain_without_running(cfg_path, chain)
    store = ChainStore(str(chain))
    t0 = time.monotonic()
    pool = ProcessPool(PosteriorFactory(cfg), 1)
    try:
        out = Driver(cfg, store, pool, store.read(), interactive=False).run(10, time_limit=4.0, clock_start=t0)
        abandoned = not pool.workers[0].ready        # the busy worker was killed: a call was given up
    finally:
        pool.close()
    elapsed = time.monotonic() - t0
    assert (out.code, out.reason, out.steps) == (EXIT_PAUSED, "time-limit", 0)
    assert abandoned
    assert elapsed < 15.0
    assert store.read().samples.meta["stop_reason"] == "time-limit"


# -- 4. one writer ---------------------------------------------------------------------------------------
@pytest.mark.slow
def test_second_writer_is_refused_and_a_killed_writers_lock_is_cleared(write_config, tmp_path, capsys):
    cfg, chain = write_config("locked.toml", steps=100000, walkers=8, ensembles=2, workers=0, seed=53,
                              checkpoint_steps=5, theory_extra="delay_seconds = 0.002")
    proc = spawn("--quiet", "run", cfg, log=tmp_path / "writer.log")
    try:
        wait_for(chain.exists, proc=proc, what="the chain file")
        host = os.uname().nodename
        holder = (f"process {proc.pid} on host {host} since ", "only one run may write a chain")
        r = cli("resume", chain)
        assert r.returncode == 2
        line = assert_one_line_error(r.stderr, *holder)
        for argv in (["run", str(cfg)], ["run", str(cfg), "--replace"]):   # from this process: same refusal
            assert main(argv) == 2
            assert_one_line_error(capsys.readouterr().err, *holder)
        r = cli("status", chain)
        assert r.returncode == 0 and f"process {proc.pid} on {host}" in r.stdout
        kill_group(proc)
    finally:
        if proc.poll() is None:
            kill_group(proc)
    before = steps_in(chain)
    assert Path(str(chain) + ".lock").exists()                  # left behind by the killed run
    r = cli("resume", chain, "--steps", before + 3)
    assert r.returncode == 0, r.stderr
    assert f"cleared a stale lock on {chain} left by process {proc.pid} on host {host}" in r.stderr
    assert steps_in(chain) == before + 3 and not Path(str(chain) + ".lock").exists()
    print(f"\nlock: refusal reads '{line}'")


# -- 5. damaged files and salvage --------------------------------------------------------------------------
@pytest.fixture(scope="module")
def long_chain(quick_data, tmp_path_factory):
    """A finished 400-step chain spanning several HDF5 chunks (128 steps each at 2 × 16 walkers)."""
    d = tmp_path_factory.mktemp("long")
    cfg = d / "long.toml"
    chain = d / "long.h5"
    cfg.write_text(quick_config_text(quick_data, chain, steps=400, walkers=16, ensembles=2, workers=0, seed=61,
                                     checkpoint_steps=100))
    assert main(["--quiet", "run", str(cfg)]) == 0
    with h5py.File(chain, "r") as f:
        assert f["draws/position"].chunks[0] == 128
    return chain


def _copy(src: Path, dst: Path) -> Path:
    shutil.copyfile(src, dst)
    return dst


@pytest.mark.slow
def test_truncated_chain_gives_a_clear_error_and_salvage_recovers_a_resumable_prefix(long_chain, tmp_path):
    ref = ChainStore(str(long_chain)).read()
    bad = _copy(long_chain, tmp_path / "truncated.h5")
    os.truncate(bad, int(0.6 * bad.stat().st_size))
    digest = sha256(bad)
    with pytest.raises(ChainFileError, match="infer salvage"):
        ChainStore(str(bad)).read()
    r = cli("status", bad)
    assert r.returncode == 2
    assert_one_line_error(r.stderr, "damaged", f"infer salvage {bad} NEW.h5")
    r = cli("salvage", bad, tmp_path / "saved.h5")
    assert r.returncode == 0, r.stderr
    assert sha256(bad) == digest                                  # the damaged original is untouched
    saved = ChainStore(str(tmp_path / "saved.h5")).read()
    n = saved.steps_done
    assert 128 <= n < 400 and n % 128 == 0
    assert_prefix(saved, ref, n)
    ev = saved.events[-1]
    assert ev["event"] == "salvage" and ev["exact_resume"] is False and ev["steps_recorded"] == 400
    assert "re-seeded" in r.stdout
    r = cli("--quiet", "resume", tmp_path / "saved.h5", "--steps", n + 10)
    assert r.returncode == 0, r.stderr
    assert steps_in(tmp_path / "saved.h5") == n + 10
    print(f"\ntruncated to 60 %: salvage recovered {n} of 400 steps; resumed to {n + 10}")


def test_flipped_byte_in_a_data_chunk_is_detected_and_salvage_keeps_the_steps_before_it(long_chain, tmp_path):
    ref = ChainStore(str(long_chain)).read()
    bad = _copy(long_chain, tmp_path / "flipped.h5")
    with h5py.File(bad, "r") as f:                                  # the third chunk of /draws/log_like
        info = f["draws/log_like"].id.get_chunk_info_by_coord((256, 0, 0))
    data = bytearray(bad.read_bytes())
    data[info.byte_offset + info.size // 2] ^= 0x01                 # a single bit
    bad.write_bytes(bytes(data))
    with pytest.raises(ChainFileError, match="damaged chain file"):
        ChainStore(str(bad)).read()
    r = cli("resume", bad)
    assert r.returncode == 2
    assert_one_line_error(r.stderr, "infer salvage")
    digest = sha256(bad)
    steps, exact = salvage(bad, tmp_path / "kept.h5")
    assert sha256(bad) == digest
    assert (steps, exact) == (256, False)
    kept = ChainStore(str(tmp_path / "kept.h5")).read()
    assert_prefix(kept, ref, 256)
    assert kept.events[-1]["lost"][0] == "steps 257–400 of 400"
    assert main(["--quiet", "resume", str(tmp_path / "kept.h5"), "--steps", "270"]) == 0
    assert steps_in(tmp_path / "kept.h5") == 270


def test_salvage_of_a_sound_chain_resumes_exactly(long_chain, tmp_path):
    a = _copy(long_chain, tmp_path / "a.h5")
    steps, exact = salvage(long_chain, tmp_path / "b.h5")
    assert (steps, exact) == (400, True)
    for chain in (a, tmp_path / "b.h5"):
        assert main(["--quiet", "resume", str(chain), "--steps", "420"]) == 0
    assert_prefix(ChainStore(str(tmp_path / "b.h5")).read(), ChainStore(str(a)).read())
    with pytest.raises(UserError, match="already exists"):
        salvage(long_chain, tmp_path / "b.h5")                     # never overwrites
    with pytest.raises(UserError, match="no such chain file"):
        salvage(tmp_path / "missing.h5", tmp_path / "c.h5")


def test_salvage_clears_the_open_for_writing_mark_of_a_writer_that_died(long_chain, tmp_path):
    """A file whose writer died with it open (HDF5 then refuses it) is salvaged whole."""
    bad = _copy(long_chain, tmp_path / "open.h5")
    pid = os.fork()
    if pid == 0:                                                    # pragma: no cover - child
        f = h5py.File(bad, "r+", locking=False)
        f.attrs["touched"] = 1
        f.flush()
        os._exit(0)
    os.waitpid(pid, 0)
    with pytest.raises(ChainFileError):
        ChainStore(str(bad)).read()
    steps, exact = salvage(bad, tmp_path / "closed.h5")
    assert (steps, exact) == (400, True)
    assert_prefix(ChainStore(str(tmp_path / "closed.h5")).read(), ChainStore(str(long_chain)).read())


_FUZZ = r"""
import json, sys
import numpy as np
from infer.store.chainfile import ChainStore, DRAWS
from infer.errors import ChainFileError
src, work, seed, n = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
ref = ChainStore(src).read()
def same(a, b):
    if a.steps_done != b.steps_done or a.provenance != b.provenance or a.events != b.events: return False
    if a.samples.names != b.samples.names or a.samples.tex != b.samples.tex: return False
    if a.samples.bounds != b.samples.bounds or a.rejections != b.rejections: return False
    arrays = [(getattr(a.samples, k), getattr(b.samples, k)) for k in DRAWS]
    arrays += [(getattr(a.start, k), getattr(b.start, k)) for k in DRAWS]
    arrays += [(a.convergence[k], b.convergence[k]) for k in a.convergence]
    arrays += [(x[1], y[1]) for x, y in zip(a.rng, b.rng)]
    same_rng = [r[2:] for r in a.rng] == [r[2:] for r in b.rng]
    return same_rng and all(np.array_equal(x, y, equal_nan=True) for x, y in arrays)
data = open(src, "rb").read()
rng = np.random.default_rng(seed)
out = {"detected": 0, "harmless": 0, "silent": []}
for off in rng.choice(len(data), size=n, replace=False):
    b = bytearray(data); b[off] ^= 1 << int(rng.integers(8))
    open(work, "wb").write(b)
    try:
        st = ChainStore(work).read()
    except ChainFileError:
        out["detected"] += 1
        continue
    if same(st, ref): out["harmless"] += 1
    else: out["silent"].append(int(off))
print(json.dumps(out))
"""


def test_any_flipped_bit_is_detected_or_harmless(long_chain, tmp_path):
    """300 single-bit flips at random offsets (metadata and data alike): each one makes `read` fail with
    ChainFileError or leaves every value unchanged (unused bytes); none changes a value silently. (The
    reads run in a child process so that a crash would be reported, not take pytest down.)"""
    r = subprocess.run([sys.executable, "-c", _FUZZ, str(long_chain), str(tmp_path / "fuzz.h5"), "7", "300"],
                       env=ENV, capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-2000:]
    out = json.loads(r.stdout.strip().splitlines()[-1])
    assert out["silent"] == [], out
    assert out["detected"] + out["harmless"] == 300
    print(f"\nbit flips: {out['detected']} detected, {out['harmless']} in unused bytes, 0 silent")


def test_lookup3_matches_the_published_values_and_hdf5(tmp_path):
    # B. Jenkins, lookup3.c (2006), driver5(): hashlittle("", 0, 0) = 0xdeadbeef,
    # hashlittle("Four score and seven years ago", 30, 0) = 0x17770551, with initval 1: 0xcd628161.
    assert lookup3(b"") == 0xDEADBEEF
    assert lookup3(b"Four score and seven years ago") == 0x17770551
    assert lookup3(b"Four score and seven years ago", 1) == 0xCD628161
    with h5py.File(tmp_path / "x.h5", "w", libver=("v110", "v110")) as f:
        f["x"] = np.arange(3)
    head = (tmp_path / "x.h5").read_bytes()[:48]                   # version-3 superblock, 8-byte offsets
    assert head[8] == 3
    assert lookup3(head[:44]) == int.from_bytes(head[44:48], "little")


# -- 6. changed run file on resume ----------------------------------------------------------------------------
@pytest.mark.slow
def test_resume_refuses_a_posterior_change_with_a_diff_and_records_allowed_ones(write_config, tmp_path):
    cfg, chain = write_config("orig.toml", steps=10, walkers=8, ensembles=2, checkpoint_steps=25, seed=71)
    assert main(["--quiet", "run", str(cfg)]) == 0
    digest = sha256(chain)
    text = cfg.read_text()
    changed = tmp_path / "changed.toml"
    changed.write_text(text.replace("prior = { uniform = [0.0, 3.0] }", "prior = { uniform = [0.0, 2.5] }", 1))
    r = cli("resume", chain, "--config", changed, "--steps", 20)
    assert r.returncode == 2
    line = assert_one_line_error(r.stderr, f"refusing to resume {chain} with {changed}",
                                 "parameters.a_1.prior.uniform: [0.0, 3.0] → [0.0, 2.5]")
    assert sha256(chain) == digest
    allowed = tmp_path / "allowed.toml"
    allowed.write_text(text.replace("checkpoint_steps = 25", "checkpoint_steps = 4"))
    r = cli("--quiet", "resume", chain, "--config", allowed, "--steps", 20)
    assert r.returncode == 0, r.stderr
    st = ChainStore(str(chain)).read()
    assert st.steps_done == 20
    resume = [e for e in st.events if e["event"] == "resume"][-1]
    assert "sampling.checkpoint_steps: 25 → 4" in resume["changes"] and "--steps 20" in resume["changes"]
    print(f"\nconfig diff refusal: {line}")


# -- 7. disk full, read-only and missing folders -----------------------------------------------------------
def _mount(*args) -> bool:
    if os.geteuid() != 0 or not shutil.which("mount"):
        return False
    return subprocess.run(["mount", *map(str, args)], capture_output=True).returncode == 0


def _umount(path):
    subprocess.run(["umount", str(path)], capture_output=True)


def _short_chain(write_config, name, folder_name):
    cfg, chain = write_config(name, steps=12, walkers=8, ensembles=2, checkpoint_steps=4, seed=81)
    folder = chain.parent.parent / folder_name
    folder.mkdir()
    target = folder / chain.name
    text = cfg.read_text().replace(str(chain), str(target))
    cfg.write_text(text)
    assert main(["--quiet", "run", str(cfg)]) == 0
    return cfg, target


@pytest.mark.slow
def test_disk_full_during_a_checkpoint_is_one_clear_line_and_the_chain_stays_intact(write_config, tmp_path):
    """A real full disk (a small tmpfs; we are root): `infer resume` fails at its first checkpoint with
    one line and the chain as it was. Then, at library level, disks of several sizes are filled 50 steps
    at a time so that the failure lands at different stages (the copy, HDF5's chunk writes, its
    metadata flush): every failure is the same clean error, with the last checkpoint intact."""
    cfg, chain = _short_chain(write_config, "full.toml", "full")
    size = chain.stat().st_size
    mnt = tmp_path / "tiny"
    mnt.mkdir()
    if not _mount("-t", "tmpfs", "-o", f"size={size + size // 3}", "tmpfs", mnt):
        pytest.skip("cannot mount a tmpfs here; test_write_failures_inside_a_checkpoint simulates ENOSPC")
    try:
        small = mnt / chain.name
        shutil.copyfile(chain, small)
        digest = sha256(small)
        r = cli("resume", small, "--steps", 40)
        assert r.returncode == 2
        err = [ln for ln in r.stderr.splitlines() if ln.startswith("infer: error")]
        assert "Traceback" not in r.stderr and len(err) == 1, r.stderr
        assert err[0] == (f"infer: error: {small}: cannot write the checkpoint (No space left on device); "
                          "the file on disk still holds the previous checkpoint")
        assert sha256(small) == digest and not strays(small)
    finally:
        _umount(mnt)
    st = ChainStore(str(chain)).read()
    block = {k: np.concatenate([getattr(st.samples, k)] * 5)[:50] for k in DRAWS}
    for factor in (2.2, 2.6, 3.0, 3.4):
        assert _mount("-t", "tmpfs", "-o", f"size={int(factor * size)}", "tmpfs", mnt)
        try:
            small = mnt / chain.name
            shutil.copyfile(chain, small)
            store, n = ChainStore(str(small)), st.steps_done
            with pytest.raises(ChainFileError, match=r"cannot write the checkpoint \(No space left on device\); "
                                                     "the file on disk still holds the previous checkpoint"):
                for i in range(200):
                    store.append(block, st.rng, events=[{"i": i}])
                    n += 50
            assert store.read().steps_done == n and not strays(small)
        finally:
            _umount(mnt)


def test_write_failures_inside_a_checkpoint_keep_the_old_file(write_config, monkeypatch, capsys):
    """Simulated (monkeypatched) errors at each stage of a checkpoint: ENOSPC from the copy, EACCES from
    the rename, EROFS from HDF5's own write. Each gives one line, exit 2, and the old file intact."""
    cfg, chain = _short_chain(write_config, "sim.toml", "sim")
    digest = sha256(chain)
    import infer.store.chainfile as store_mod
    real_copy, real_replace = shutil.copyfile, os.replace

    def no_space(src, dst, **kw):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def no_rename(src, dst):
        if ".tmp-" in str(src):
            raise PermissionError(errno.EACCES, os.strerror(errno.EACCES))
        return real_replace(src, dst)

    real_grow = store_mod.ChainStore._grow

    def ro_grow(*args, **kw):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS))

    for patch, what in ((("shutil.copyfile", no_space), "No space left on device"),
                        (("os.replace", no_rename), "Permission denied"),
                        (("infer.store.chainfile.ChainStore._grow", staticmethod(ro_grow)), "Read-only file system")):
        with monkeypatch.context() as m:
            m.setattr(*patch)
            code = main(["--quiet", "resume", str(chain), "--steps", "20"])
        err = capsys.readouterr().err
        assert code == 2
        assert_one_line_error(err, f"{chain}: cannot write the checkpoint ({what}); the file on disk still "
                              "holds the previous checkpoint")
        assert sha256(chain) == digest and not strays(chain)
    assert shutil.copyfile is real_copy and store_mod.ChainStore._grow is real_grow
    assert main(["--quiet", "resume", str(chain), "--steps", "20"]) == 0


def test_read_only_and_missing_folders_give_one_line(write_config, tmp_path, monkeypatch, capsys):
    cfg, chain = _short_chain(write_config, "ro.toml", "ro")
    folder = chain.parent
    digest = sha256(chain)
    # Tests run as root, for whom chmod does not stop writes: use a read-only bind mount, or else
    # make os.access/os.open report EROFS for that folder (same code path, simulated).
    mounted = _mount("--bind", folder, folder) and _mount("-o", "remount,ro,bind", folder)
    try:
        if not mounted:
            _umount(folder)
            real_open, real_access = os.open, os.access

            def ro_open(path, flags, *a, **kw):
                if str(path).startswith(str(folder)) and flags & (os.O_WRONLY | os.O_RDWR | os.O_CREAT):
                    raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(path))
                return real_open(path, flags, *a, **kw)

            monkeypatch.setattr(os, "open", ro_open)
            monkeypatch.setattr(os, "access", lambda p, m, **kw: False if str(p).startswith(str(folder))
                                and m & os.W_OK else real_access(p, m, **kw))
        code = main(["resume", str(chain), "--steps", "20"])
        assert code == 2
        assert_one_line_error(capsys.readouterr().err, f"{chain}.lock: cannot create the lock file "
                              "(Read-only file system)")
        code = main(["run", str(cfg), "--replace"])
        assert code == 2
        assert_one_line_error(capsys.readouterr().err, str(folder), "not writable")
        assert sha256(chain) == digest
    finally:
        if mounted:
            _umount(folder)
        monkeypatch.undo()
    # A folder that disappears while a run is going: the checkpoint fails with one line.
    store = ChainStore(str(chain))
    st = store.read()
    shutil.rmtree(folder)
    with pytest.raises(ChainFileError, match="cannot write the checkpoint .*the chain file or its folder has "
                                             "disappeared"):
        store.append(st.samples.head(1).draws, st.rng)
    assert main(["resume", str(chain)]) == 2
    assert_one_line_error(capsys.readouterr().err, f"{chain}: no such chain file")


# -- 8. theory codes that kill their own process ------------------------------------------------------------
@pytest.mark.parametrize("action,workers,how", [("segfault", 2, "signal 11"), ("exit", 1, "exit code 3")])
def test_a_theory_that_kills_its_process_costs_one_point(write_config, capsys, action, workers, how):
    """Points with a_1 > 1.2 abort their process. Each costs that point (ln p = −∞, counted, parameters
    logged) and nothing else: the chain equals, value for value, the run whose theory raises an ordinary
    error at the same points."""
    fault = 'fault = {{ parameter = "a_1", above = 1.2, action = "{}" }}'
    ref_cfg, ref_chain = write_config(f"err-{action}.toml", steps=20, walkers=8, ensembles=2, workers=0, seed=3,
                                      theory_extra=fault.format("error"))
    cfg, chain = write_config(f"{action}.toml", steps=20, walkers=8, ensembles=2, workers=workers, seed=3,
                              theory_extra=fault.format(action))
    assert main(["--quiet", "run", str(ref_cfg)]) == 0
    capsys.readouterr()
    assert main(["run", str(cfg)]) == 0                 # the workers are separate processes all the same
    stderr = capsys.readouterr().err
    ref, st = ChainStore(str(ref_chain)).read(), ChainStore(str(chain)).read()
    assert_prefix(st, ref)
    died = ref.rejections["injected-fault"]
    assert died >= 1
    others = {k: v for k, v in ref.rejections.items() if k != "injected-fault"}
    assert st.rejections == {**others, "theory-process-died": died}
    assert len(st.failures) == died and all(f["how"] == how for f in st.failures)
    assert all(f["point"][0] > 1.2 for f in st.failures)
    assert stderr.count(f"the theory process died ({how})") >= died and "Traceback" not in stderr
    print(f"\n{action} with {workers} worker(s): {died} points lost to dead theory processes, chain unchanged")


# -- 9. user errors and exact stopping after resume ---------------------------------------------------------
def test_user_errors_are_one_line_exit_2(write_config, tmp_path, capsys):
    cfg, chain = write_config("u.toml", steps=5)
    junk = tmp_path / "junk.h5"
    junk.write_text("not a chain\n")
    (tmp_path / "exists.h5").write_text("x")
    cases = [(["status", str(tmp_path / "none.h5")], "no such chain file"),
             (["status", str(junk)], "damaged or not an HDF5 file"),
             (["resume", str(junk)], "damaged or not an HDF5 file"),
             (["salvage", str(junk), str(tmp_path / "out.h5")], "cannot be salvaged"),
             (["salvage", str(junk), str(tmp_path / "exists.h5")], "already exists"),
             (["salvage", str(junk), str(junk)], "already exists"),
             (["salvage", str(junk), str(tmp_path / "nofolder" / "x.h5")], "no such folder"),
             (["run", str(tmp_path / "missing.toml")], "no such run file")]
    for argv, needle in cases:
        assert main(argv) == 2, argv
        assert_one_line_error(capsys.readouterr().err, needle)
    assert not (tmp_path / "out.h5").exists()


@pytest.mark.slow
def test_resume_stops_at_the_same_step_as_an_uninterrupted_converging_run(write_config):
    """A run whose stopping targets are met at a check stops there; paused before that check (at a step
    that is not a check) and resumed, it stops at the same step with the same chain and checks."""
    opts = dict(steps=100, walkers=8, ensembles=2, seed=91, check_every=10, checkpoint_steps=3,
                stopping_extra="min_steps = 25\ntau_multiple = 0.0")
    a_cfg, a = write_config("conv-a.toml", **opts)
    b_cfg, b = write_config("conv-b.toml", **opts)
    for path in (a_cfg, b_cfg):      # targets any chain meets once it is 25 steps long
        path.write_text(path.read_text().replace("rhat_below = 1.01", "rhat_below = 10.0")
                        .replace("ess_above = 1e9", "ess_above = 1.0"))
    assert main(["--quiet", "run", str(a_cfg)]) == 0
    ra = ChainStore(str(a)).read()
    assert ra.samples.meta["stop_reason"] == "converged" and 25 <= ra.steps_done < 100
    assert main(["--quiet", "run", str(b_cfg), "--steps", "23"]) == 0
    assert main(["--quiet", "resume", str(b)]) == 0
    rb = ChainStore(str(b)).read()
    assert rb.samples.meta["stop_reason"] == "converged"
    assert_prefix(rb, ra)
    for k in ra.convergence:
        assert np.array_equal(ra.convergence[k], rb.convergence[k]), k
