"""The step state, the two chain stores and the batched lock-step of ensembles.

External reference for the sampling claims: emcee itself (Foreman-Mackey et al. 2013, PASP 125, 306;
the `emcee` package from PyPI). A chain of the driver must equal, value for value, what emcee's own
``EnsembleSampler.sample`` gives for each ensemble stepped on its own with the same starting state and
random state — the driver only batches the evaluations of all ensembles' half-steps into one call. The
model is the exactly solvable template theory of tests/conftest.py, evaluated in this process.
"""
from __future__ import annotations

import ast
import threading
from pathlib import Path

import emcee
import numpy as np
import pytest

from infer import config
from infer.analysis.samples import DRAWS, Samples
from infer.errors import EXIT_OK, EXIT_PAUSED
from infer.model.posterior import Posterior
from infer.parallel import InProcess, Interrupted
from infer.sampling.driver import Driver
from infer.sampling.moves import LockStep, make_moves
from infer.sampling.start import starting_ball
from infer.sampling.state import BlobLayout, DrawBuffer, StepState
from infer.store.chainfile import ChainStore
from infer.store.memory import MemoryStore

REPO = Path(__file__).resolve().parents[1]


class Counting(InProcess):
    """The in-process evaluator, counting its calls and the points of each; optionally interrupted at
    call ``stop_at`` (as a signal or the wall-time budget would) or returning NaN from call ``nan_at``."""

    def __init__(self, posterior, stop_at=None, nan_at=None):
        super().__init__(posterior)
        self.sizes: list[int] = []
        self.stop_at, self.nan_at = stop_at, nan_at

    def evaluate(self, points):
        self.sizes.append(len(points))
        if self.stop_at is not None and len(self.sizes) == self.stop_at:
            raise Interrupted
        lp, blobs, reasons = super().evaluate(points)
        if self.nan_at is not None and len(self.sizes) == self.nan_at:
            lp = np.full_like(lp, np.nan)
        return lp, blobs, reasons


def _setup(write_config, name, **options):
    cfg_path, _ = write_config(name, **options)
    cfg = config.load(cfg_path)
    post = Posterior(cfg)
    return cfg, post


def _create(store, cfg, post):
    start = starting_ball(cfg, InProcess(post), post.blob_names)
    store.create(names=post.names, derived_names=post.derived_names, tex={n: n for n in post.names},
                 bounds=post.priors.bounds, start=start, provenance={"config_text": cfg.text, "seed": cfg.seed})
    return start


def _run(store, cfg, post, steps, evaluator=None):
    ev = evaluator or InProcess(post)
    return Driver(cfg, store, ev, store.read(), interactive=False).run(steps)


def _strip_times(events):
    return [{k: v for k, v in e.items() if k not in ("time", "pid", "host")} for e in events]


def assert_same_state(a, b):
    assert a.steps_done == b.steps_done
    for k in DRAWS:
        assert np.array_equal(getattr(a.samples, k), getattr(b.samples, k), equal_nan=True), k
        assert np.array_equal(getattr(a.start, k), getattr(b.start, k), equal_nan=True), f"start {k}"
    for ra, rb in zip(a.rng, b.rng, strict=True):
        assert ra[0] == rb[0] and np.array_equal(ra[1], rb[1]) and ra[2:] == rb[2:]
    assert a.samples.names == b.samples.names and a.samples.derived_names == b.samples.derived_names
    assert a.samples.tex == b.samples.tex and a.samples.bounds == b.samples.bounds
    assert a.samples.meta["stop_reason"] == b.samples.meta["stop_reason"]
    assert a.rejections == b.rejections and a.failures == b.failures
    assert a.provenance == b.provenance
    assert _strip_times(a.events) == _strip_times(b.events)
    assert set(a.convergence) == set(b.convergence)
    for k in a.convergence:
        assert np.array_equal(a.convergence[k], b.convergence[k], equal_nan=True), k


# -- the two stores --------------------------------------------------------------------------------------------
def test_memory_and_file_stores_give_identical_chains(write_config, tmp_path):
    priors = {n: "{ uniform = [0.0, 3.0] }" for n in ("a_2", "a_3", "a_4")}
    priors["a_1"] = "{ uniform = [0.0, 1.05] }"                  # so that some points are rejected
    cfg, post = _setup(write_config, "stores.toml", steps=60, walkers=8, ensembles=3, seed=17, check_every=20,
                       checkpoint_steps=7, priors=priors)
    mem, disk = MemoryStore(), ChainStore(str(tmp_path / "disk.h5"))
    for store in (mem, disk):
        _create(store, cfg, post)
        assert store.steps_done() == 0
        out = _run(store, cfg, post, 25)                          # a session that stops …
        assert (out.code, out.reason, out.steps) == (EXIT_OK, "max-steps", 25)
        out = _run(store, cfg, post, 60)                          # … and one that resumes it
        assert out.steps == 60 and store.steps_done() == 60
    a, b = mem.read(), disk.read()
    assert_same_state(a, b)
    assert a.rejections.get("outside-prior", 0) > 0              # the records are exercised too
    assert len(a.convergence["step"]) == 3
    assert [e["event"] for e in a.events] == ["stop", "stop"]


def test_memory_store_keeps_copies(write_config):
    cfg, post = _setup(write_config, "copies.toml", steps=10, walkers=8, ensembles=2, seed=5)
    store = MemoryStore()
    _create(store, cfg, post)
    _run(store, cfg, post, 10)
    before = store.read()
    got = store.read()
    got.samples.position[...] = 0.0                              # a reader's changes …
    got.rng[0][1][...] = 0
    block = {k: a[-2:].copy() for k, a in before.samples.draws.items()}
    store.append(block, before.rng)
    for a in block.values():                                     # … and a writer's reused buffers
        a[...] = -1.0
    after = store.read()
    assert after.steps_done == 12
    assert np.array_equal(after.samples.position[:10], before.samples.position)
    assert np.array_equal(after.samples.position[10:], before.samples.position[-2:])
    assert np.array_equal(after.rng[0][1], before.rng[0][1])


def test_stores_refuse_inconsistent_steps(write_config, tmp_path):
    cfg, post = _setup(write_config, "bad.toml", steps=4, walkers=8, ensembles=2, seed=5)
    for store in (MemoryStore(), ChainStore(str(tmp_path / "bad.h5"))):
        start = _create(store, cfg, post)
        wrong = {k: a[None] for k, a in start.draws.items()}
        wrong["derived"] = wrong["derived"][..., :-1]
        with pytest.raises(ValueError, match="derived"):
            store.append(wrong, start.rng)
        assert store.steps_done() == 0


# -- batched half-steps ------------------------------------------------------------------------------------
@pytest.mark.parametrize("moves", ["de-snooker", "stretch", "de"])
def test_all_ensembles_substeps_share_one_call_and_chains_equal_emcee_per_ensemble(write_config, moves):
    """emcee's DE and stretch moves update an ensemble in two halves, its DE-snooker move in four quarters
    (emcee.moves.DESnookerMove: nsplits = 4), each a call of the ln-probability. Stepped together, the
    r-th sub-step of every ensemble is one call: a step costs max over ensembles of its sub-steps (2 for
    DE and stretch), and each call holds the points emcee asks for in that sub-step, ensemble by ensemble."""
    E, W, T = 3, 10, 15
    cfg, post = _setup(write_config, f"batch-{moves}.toml", steps=T, walkers=W, ensembles=E, seed=29, moves=moves)
    store = MemoryStore()
    start = _create(store, cfg, post)
    ev = Counting(post)
    assert _run(store, cfg, post, T, ev).steps == T
    got = store.read()

    sizes = [[[] for _ in range(T)] for _ in range(E)]          # sizes[e][t]: emcee's calls of ensemble e, step t
    for e in range(E):                                           # reference: emcee's own sampler per ensemble
        step = {"t": 0}

        def log_prob(x):                                         # the same posterior, one ensemble at a time
            sizes[e][step["t"]].append(len(x))
            lp, blobs, _ = InProcess(post).evaluate(x)
            return list(zip(lp, blobs))

        sampler = emcee.EnsembleSampler(W, len(post.names), log_prob, vectorize=True, moves=make_moves(moves))
        states = []                                              # emcee updates its State in place: copy it
        for s in sampler.sample(start.ensemble(e), iterations=T, store=False, skip_initial_state_check=True):
            states.append((s.coords.copy(), s.log_prob.copy(), np.array(s.blobs, float), s.random_state))
            step["t"] += 1
        assert np.array_equal(got.samples.position[:, e], np.stack([s[0] for s in states]))
        assert np.array_equal(got.samples.log_post[:, e], np.stack([s[1] for s in states]))
        blobs = np.stack([s[2] for s in states])
        assert np.array_equal(got.samples.log_like[:, e], blobs[..., 0], equal_nan=True)
        assert np.array_equal(got.samples.derived[:, e], blobs[..., 1:], equal_nan=True)
        rs = states[-1][3]
        assert np.array_equal(got.rng[e][1], rs[1]) and got.rng[e][2:] == rs[2:]

    expected = []
    for t in range(T):
        rounds = max(len(sizes[e][t]) for e in range(E))
        expected += [sum(sizes[e][t][r] for e in range(E) if r < len(sizes[e][t])) for r in range(rounds)]
    assert ev.sizes == expected
    unbatched = sum(len(sizes[e][t]) for e in range(E) for t in range(T))
    if moves in ("stretch", "de"):
        assert ev.sizes == [E * W // 2] * (2 * T)                # two calls per step, each of E·W/2 points
    else:
        assert 2 * T <= len(ev.sizes) <= 4 * T < unbatched
    print(f"\n{moves}: {len(ev.sizes)} evaluation calls for {T} steps of {E} ensembles "
          f"(one after another: {unbatched})")


def _ensemble_threads():
    return [t for t in threading.enumerate() if t.name.startswith("infer-ensemble-")]


def test_an_interrupted_step_is_abandoned_without_threads_and_resumes_exactly(write_config):
    cfg, post = _setup(write_config, "stop.toml", steps=20, walkers=8, ensembles=3, seed=37, checkpoint_steps=4,
                       moves="stretch")                            # two calls per step
    ref = MemoryStore()
    _create(ref, cfg, post)
    _run(ref, cfg, post, 20)
    store = MemoryStore()
    _create(store, cfg, post)
    ev = Counting(post, stop_at=2 * 9 + 2)                       # in the second half-step of step 10
    out = _run(store, cfg, post, 20, ev)
    assert (out.code, out.steps) == (EXIT_PAUSED, 9)
    assert store.steps_done() == 9 and not _ensemble_threads()
    assert _run(store, cfg, post, 20).steps == 20
    a, b = store.read(), ref.read()
    for k in DRAWS:
        assert np.array_equal(getattr(a.samples, k), getattr(b.samples, k), equal_nan=True), k
    assert a.rejections == b.rejections
    assert all(np.array_equal(x[1], y[1]) and x[2:] == y[2:] for x, y in zip(a.rng, b.rng))


def test_an_error_inside_emcee_reaches_the_caller_and_ends_every_thread(write_config):
    cfg, post = _setup(write_config, "nan.toml", steps=5, walkers=8, ensembles=2, seed=41)
    store = MemoryStore()
    _create(store, cfg, post)
    with pytest.raises(ValueError, match="NaN"):                 # emcee's own check, raised in its thread
        _run(store, cfg, post, 5, Counting(post, nan_at=3))
    assert not _ensemble_threads() and store.steps_done() == 0


def test_lockstep_cannot_be_reused_after_abandon(write_config):
    cfg, post = _setup(write_config, "reuse.toml", steps=2, walkers=8, ensembles=2, seed=43)
    start = starting_ball(cfg, InProcess(post), post.blob_names)
    calls = {"n": 0}

    def evaluate(points):
        calls["n"] += 1
        raise Interrupted

    step = LockStep(start, BlobLayout.from_blob_names(post.blob_names), "de-snooker", evaluate)
    with pytest.raises(Interrupted):
        step.step()
    assert calls["n"] == 1 and not _ensemble_threads()
    with pytest.raises(RuntimeError):
        step.step()
    step.close()


# -- value objects ---------------------------------------------------------------------------------------------
def test_blob_layout_and_step_state_round_trip():
    layout = BlobLayout.from_blob_names(("log_like", "H0", "chi2"))
    assert layout.names == ("log_like", "H0", "chi2") and layout.size == 3
    blobs = np.arange(2 * 4 * 3, dtype=float).reshape(2, 4, 3)
    st = StepState.from_blobs(np.zeros((2, 4, 5)), np.ones((2, 4)), blobs, layout, rng=[None, None])
    assert np.array_equal(st.log_like, blobs[..., 0]) and np.array_equal(st.derived, blobs[..., 1:])
    assert np.array_equal(st.blobs, blobs) and (st.ensembles, st.walkers) == (2, 4)
    with pytest.raises(ValueError):
        BlobLayout.from_blob_names(("chi2", "log_like"))
    with pytest.raises(ValueError):
        layout.split(blobs[..., :2])


def test_draw_buffer_grows_by_doubling_and_gives_views():
    buf = DrawBuffer(2, 3, 4, 1, capacity=2, limit=9)
    caps = []
    for i in range(9):
        buf.add(StepState(np.full((2, 3, 4), i), np.full((2, 3), i), np.full((2, 3), -i), np.full((2, 3, 1), i)))
        caps.append(buf.capacity)
    assert caps == [2, 2, 4, 4, 8, 8, 8, 8, 9]                   # doubling, capped at the run's length
    v = buf.view(3, 6)
    assert np.array_equal(v["log_post"][:, 0, 0], [3, 4, 5]) and v["position"].base is not None
    s = Samples.from_draws(("a", "b", "c", "d"), ("x",), buf.view())
    assert s.steps == 9 and np.shares_memory(s.position, buf.view()["position"])
    assert np.shares_memory(s.after(4).derived, s.derived) and s.head(3).steps == 3


def test_samples_are_built_in_one_place():
    """No module builds a `Samples` by position: no ``Samples(...)`` or ``type(x)(...)`` call anywhere in the
    package; `Samples.from_draws` (whose ``cls(...)`` is the one constructor call) is the way in."""
    found = []
    for path in sorted((REPO / "infer").rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if not isinstance(node, ast.Call):
                continue
            f = node.func
            name = getattr(f, "id", getattr(f, "attr", None))
            rebuilt = isinstance(f, ast.Call) and getattr(f.func, "id", None) == "type"
            if name == "Samples" or rebuilt:
                found.append(f"{path.relative_to(REPO)}:{node.lineno}")
    assert found == [], found
