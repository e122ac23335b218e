"""Benchmark: parallel efficiency of walker evaluation, and the driver's serial costs (checkpoint, check).

Not collected by pytest (no ``test_`` prefix). Run from the repository root:

    python benchmarks/bench_parallel.py                      # CAMB via configs/kestrel_demo.toml (accuracy "fast")
    python benchmarks/bench_parallel.py --points 16 --repeats 5
    python benchmarks/bench_parallel.py --theory templates --delay 0.2     # machinery only, no Boltzmann code

What is measured, and how:

1. One batch of ``--points`` posterior points of the Kestrel demo run (configs/kestrel_demo.toml: CAMB
   with accuracy "fast", θ_* sampled, 147 TT/TE/EE bands to ℓ = 1500; the points are a Gaussian cloud of
   the run file's guesses ± spreads, so each CAMB call is a real call at a different point) is evaluated
   with `infer.parallel.ProcessPool` as
   (a) 1 worker × 1 OpenMP thread, (b) 2 workers × 1 thread — *process* parallelism, what ``[sampling]
   workers`` and MPI ranks give, (c) 1 worker × 2 threads — *thread* parallelism inside CAMB. Workers are
   started and warmed up (one call each) before timing; the configurations are timed in interleaved
   rounds (so that load from other processes falls on all alike) and the median of ``--repeats`` rounds
   is reported.
   Efficiency of a configuration with n cores = t(1 × 1) / (n · t(config)).
2. The same batch under MPI (``mpiexec -n 3``: rank 0 drives, 2 ranks evaluate) if mpiexec is found, with
   the theory in an isolated process per rank (``workers`` ≥ 1, the default) and inside the ranks
   (``workers = 0``); this adds the message cost per point to (b).
3. Whether the ln posterior values of all configurations agree bit for bit (the claim that a chain does
   not depend on how it was parallelised rests on it; OpenMP threads inside CAMB could break it).
4. The driver's serial costs, during which every evaluating rank idles: one checkpoint (appending 50
   steps to a chain file, which the store copies whole, see `infer.store`) and one convergence check
   (`convergence.assess`), at chain sizes of a realistic run (4 ensembles × 64 walkers, 7 sampled and 8
   derived quantities: ΛCDM + one nuisance; CAMB's 7 derived + χ²).
5. The cost per point of MPI messaging plus the hop to the rank's isolated process (``mpiexec -n 2``, the
   template model with no delay, so nearly all of the time is overhead) against one process.
6. Calls per effective sample and τ_int of an ensemble run on the 4-parameter Gaussian template posterior
   (4 ensembles × 64 walkers): a measured, optimistic stand-in for a CMB posterior.

It then prints the scaling model of the README's cluster section for 16–256 ranks, fed with these figures:
per step every ensemble makes 2 posterior calls of W/2 points (emcee's red-blue moves) and the E ensembles
are stepped one after the other, so with n = N − 1 evaluating ranks a call takes ⌈W/2n⌉ rounds of
(t + o); the driver adds its checkpoint and check costs per step; wall time per effective sample =
calls per effective sample κ × step time / (E·W). Columns: (a) the given W; (b) W = 2n, so every call is
one round; (c) the proposed batching of all ensembles' halves into one call (E·W/2 points per call).
"""
from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))


# -- set-up ----------------------------------------------------------------------------------------------
def template_run_file(folder: Path, delay: float) -> Path:
    sys.path.insert(0, str(REPO / "tests"))
    from conftest import make_quick_dataset, quick_config_text
    data = folder / "quick.h5"
    if not data.exists():
        make_quick_dataset(data)
    path = folder / f"bench_templates_{delay:g}.toml"
    path.write_text(quick_config_text(data, folder / "unused.h5", theory_extra=f"delay_seconds = {delay}"))
    return path


def point_cloud(cfg, n: int, seed: int = 1) -> np.ndarray:
    rng = np.random.default_rng(seed)
    guess = np.array([p.guess for p in cfg.sampled])
    spread = np.array([p.spread for p in cfg.sampled])
    return guess + spread * rng.standard_normal((n, len(guess)))


# -- measurements ----------------------------------------------------------------------------------------
def time_batches(evaluator, points, repeats):
    evaluator.evaluate(points[:max(1, len(getattr(evaluator, "workers", [0])))])   # warm-up: one call each
    times, lp = [], None
    for _ in range(repeats):
        t = time.perf_counter()
        lp, _, reasons = evaluator.evaluate(points)
        times.append(time.perf_counter() - t)
    bad = [r for r in reasons if r]
    if bad:
        raise SystemExit(f"the benchmark points are not all computable: {bad}")
    return statistics.median(times), times, lp


def pool_figures(cfg, points, repeats):
    """The three pool configurations, timed in interleaved rounds (A, B, C, A, B, C, …) so that load from
    other processes on a shared machine falls on all of them alike; the median round is reported."""
    from infer.parallel import ProcessPool
    from infer.model.posterior import PosteriorFactory
    configs = (("1 worker x 1 thread", 1, 1), ("2 workers x 1 thread", 2, 1), ("1 worker x 2 threads", 1, 2))
    pools = {label: ProcessPool(PosteriorFactory(cfg), workers, threads) for label, workers, threads in configs}
    try:
        for pool in pools.values():
            pool.evaluate(points[:len(pool.workers)])                     # warm-up: one call per worker
        times = {label: [] for label in pools}
        lps = {}
        for _ in range(repeats):
            for label, pool in pools.items():
                t = time.perf_counter()
                lp, _, reasons = pool.evaluate(points)
                times[label].append(time.perf_counter() - t)
                if any(reasons):
                    raise SystemExit(f"the benchmark points are not all computable: {reasons}")
                lps[label] = lp
    finally:
        for pool in pools.values():
            pool.close()
    out = {}
    for label, workers, threads in configs:
        med = statistics.median(times[label])
        out[label] = {"cores": workers * threads, "batch_s": med, "all_s": times[label], "lp": lps[label].tolist()}
        print(f"  {label:<22} {med:8.3f} s per batch of {len(points)}  ({med / len(points):.3f} s per point; "
              f"rounds {', '.join(f'{x:.2f}' for x in times[label])})", flush=True)
    return out


def mpi_figures(run_file: Path, points_file: Path, repeats: int, ranks: int, quiet: bool = False,
                in_rank: bool = False):
    exe = shutil.which("mpiexec", path=os.path.dirname(sys.executable)) or shutil.which("mpiexec")
    if exe is None:
        print("  (no mpiexec found: pip install \".[mpi]\")")
        return None
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PMI_", "PMIX_", "OMPI_"))}
    env["OMP_NUM_THREADS"] = "1"
    env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(REPO), env.get("PYTHONPATH")]))
    cmd = [exe, "-n", str(ranks), sys.executable, __file__, "--mpi-child", str(run_file), str(points_file),
           str(repeats), "0" if in_rank else "1"]
    res = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=3600)
    lines = [line for line in res.stdout.splitlines() if line.startswith("{")]
    if res.returncode or not lines:
        print(f"  MPI run failed ({res.returncode}): {res.stderr[-2000:]}")
        return None
    fig = json.loads(lines[-1])
    if not quiet:
        where = "in the rank" if in_rank else "isolated process"
        print(f"  {f'MPI -n {ranks}, {where}':<22} {fig['batch_s']:8.3f} s per batch of {len(fig['lp'])}  "
              f"({ranks - 1} ranks x 1 thread; rounds {', '.join(f'{x:.2f}' for x in fig['all_s'])})", flush=True)
    return fig


def mpi_child(run_file: str, points_file: str, repeats: int, isolated: bool) -> int:
    """Inside ``mpiexec``: rank 0 times MPIEvaluator on the batch, the other ranks serve; ``isolated``:
    each rank computes in a worker process of its own (``workers`` ≥ 1), else inside the rank."""
    from dataclasses import replace
    from infer import config
    from infer.parallel import mpi
    from infer.model.posterior import PosteriorFactory
    mpi.start()
    if not mpi.is_root():
        return mpi.serve()
    try:
        cfg = config.load(run_file)
        cfg = replace(cfg, sampling=replace(cfg.sampling, workers=1 if isolated else 0))
        points = np.load(points_file, allow_pickle=False)
        with mpi.MPIEvaluator(PosteriorFactory(cfg), isolate=isolated) as ev:
            ev.evaluate(points[:len(ev.ranks)])                      # warm-up: one call per rank
            med, times, lp = time_batches(ev, points, repeats)
        print(json.dumps({"batch_s": med, "all_s": times, "lp": lp.tolist()}))
    finally:
        mpi.shutdown()
    return 0


def store_figures(sizes, folder: Path, E=4, W=64, P=7, D=8, add=50):
    from infer.sampling import stopping as convergence
    from infer.config import Stopping
    from infer.store.chainfile import ChainStore
    rng = np.random.default_rng(0)
    states = [np.random.RandomState(e).get_state() for e in range(E)]
    rows = []
    for T in sizes:
        path = folder / f"chain_{T}.h5"
        store = ChainStore(str(path))
        names, derived = [f"p{i}" for i in range(P)], [f"d{i}" for i in range(D)]
        draws = {"position": rng.standard_normal((T, E, W, P)), "log_post": rng.standard_normal((T, E, W)),
                 "log_like": rng.standard_normal((T, E, W)), "derived": rng.standard_normal((T, E, W, D))}
        store.create(names=names, derived_names=derived, tex={}, bounds={n: (-10.0, 10.0) for n in names},
                     ensembles=E, walkers=W, start={"position": draws["position"][0],
                                                    "log_post": draws["log_post"][0],
                                                    "blobs": np.zeros((E, W, D + 1))},
                     rng=states, provenance={"run_name": "bench"}, draws=draws)
        del draws
        block = {"position": rng.standard_normal((add, E, W, P)), "log_post": rng.standard_normal((add, E, W)),
                 "log_like": rng.standard_normal((add, E, W)), "derived": rng.standard_normal((add, E, W, D))}
        ck = []
        for _ in range(3):
            t = time.perf_counter()
            store.append(**block, rng=states)
            ck.append(time.perf_counter() - t)
        size = path.stat().st_size
        samples = store.read().samples
        t = time.perf_counter()
        convergence.assess(samples, Stopping())
        check = time.perf_counter() - t
        rows.append({"steps": T + 3 * add, "size_MB": size / 1e6, "checkpoint_s": statistics.median(ck),
                     "check_s": check})
        print(f"  {T + 3 * add:>7} steps  {size / 1e6:8.1f} MB   checkpoint {statistics.median(ck):6.2f} s   "
              f"convergence check {check:6.2f} s", flush=True)
        path.unlink()
    return rows


def overhead_figure(folder: Path, repeats: int, n_points: int = 256):
    """Seconds of messaging per point under MPI: mpiexec -n 2 against one process, template model, no delay."""
    from infer import config
    from infer.parallel import InProcess
    from infer.model.posterior import Posterior
    run_file = template_run_file(folder, 0.0)
    cfg = config.load(run_file)
    points = point_cloud(cfg, n_points, seed=2)
    points_file = folder / "overhead_points.npy"
    np.save(points_file, points, allow_pickle=False)
    local, _, _ = time_batches(InProcess(Posterior(cfg)), points, repeats)
    m = mpi_figures(run_file, points_file, repeats, 2, quiet=True)
    if m is None:
        return None
    o = max(0.0, (m["batch_s"] - local) / n_points)
    print(f"  MPI message cost per point: {1e3 * o:.2f} ms  ({n_points} points: {m['batch_s']:.3f} s on 1 rank "
          f"against {local:.3f} s in one process)", flush=True)
    return o


def kappa_figure(folder: Path, steps: int, quick_data_dir: Path):
    """Calls per effective sample and τ_int (steps) of a 4 × 64-walker run on the Gaussian template posterior."""
    from infer.sampling import stopping as convergence
    from infer.cli import main as infer_main
    from infer.config import Stopping
    from infer.store.chainfile import ChainStore
    sys.path.insert(0, str(REPO / "tests"))
    from conftest import make_quick_dataset, quick_config_text
    data = quick_data_dir / "quick.h5"
    if not data.exists():
        make_quick_dataset(data)
    chain = folder / "kappa.h5"
    run_file = folder / "kappa.toml"
    run_file.write_text(quick_config_text(data, chain, steps=steps, walkers=64, ensembles=4, workers=0,
                                          checkpoint_steps=500, check_every=steps))
    infer_main(["--quiet", "run", str(run_file)])
    s = ChainStore(str(chain)).read().samples
    v = convergence.assess(s, Stopping())
    ess = min(v.ess_bulk_min, v.ess_tail_min)
    kept = (s.steps - v.burn) * s.position.shape[1] * s.position.shape[2]
    kappa = kept / ess
    print(f"  {steps} steps × 4 × 64 walkers: τ_int max {v.tau_max:.1f} steps, burn-in {v.burn} steps, "
          f"ESS min {ess:.0f} → {kappa:.1f} calls per effective sample", flush=True)
    return kappa, v.tau_max


def _step_calls(E, W, n, t_o, batched, p_snooker=0.2):
    """Expected seconds of theory calls per step with the default DE (0.8) + snooker (0.2) move mixture:
    a DE ensemble updates in 2 halves of W/2 walkers, a snooker ensemble in 4 quarters of W/4 (emcee's
    DESnookerMove, nsplits = 4). Unbatched, ensembles step one after another; batched (infer's lock-step),
    sub-step j of every ensemble goes into one call, so a step is 2 calls, or 4 if any ensemble snookers."""
    total = 0.0
    for s in range(E + 1):                                # s ensembles drew the snooker move
        prob = math.comb(E, s) * p_snooker ** s * (1 - p_snooker) ** (E - s)
        if batched:
            calls = [(E - s) * (W // 2) + s * (W // 4)] * 2 + ([s * (W // 4)] * 2 if s else [])
        else:
            calls = [W // 2] * (2 * (E - s)) + [W // 4] * (4 * s)
        total += prob * sum(math.ceil(c / n) for c in calls if c) * t_o
    return total


def scaling_model(t, o, ckpt, check, *, kappa, tau, W=64, E=4, k=50, m=50, tau_multiple=50,
                  ranks=(16, 32, 64, 128, 256)):
    """Wall time per effective sample (and the run-length floor) for N ranks; see the module docstring.
    (a) W walkers, ensembles stepped one after another; (b) W = 2(N − 1), one after another; (c) W walkers,
    every ensemble's sub-steps batched into one call (what the driver does)."""
    rows = []
    for N in ranks:
        n = N - 1
        row = {"ranks": N}
        for label, walkers, batched in (("a", W, False), ("b", 2 * n, False), ("c", W, True)):
            scale = walkers / W                         # chain size and check cost grow with the walkers
            theory = _step_calls(E, walkers, n, t + o, batched)
            step = theory + scale * (ckpt / k + check / m)
            busy = E * walkers * t / (n * theory) if theory else 0.0
            row[label] = {"walkers": walkers, "busy": busy, "step_s": step,
                          "wall_per_ess_s": kappa * step / (E * walkers),
                          "efficiency": E * walkers * t / (n * step),
                          "floor_h": tau_multiple * tau * step / 3600}
        rows.append(row)
    return rows


def print_model(rows, t, o, ckpt, check, kappa, tau, W=64, E=4):
    print(f"scaling model: t = {t:.2f} s per point, o = {1e3 * o:.1f} ms, checkpoint {ckpt:.2f} s per 50 steps, "
          f"check {check:.1f} s per 50 steps, κ = {kappa:.0f} calls per effective sample, τ = {tau:.0f} steps, "
          f"E = {E} ensembles")
    print("  N ranks | (a) W=64: busy  s/ESS  eff   floor | (b) W=2(N-1): W  s/ESS  eff   floor | "
          "(c) W=64 batched: busy  s/ESS  eff   floor")
    for r in rows:
        a, b, c = r["a"], r["b"], r["c"]
        print(f"  {r['ranks']:>7} | {100 * a['busy']:9.0f}% {a['wall_per_ess_s']:6.2f} {100 * a['efficiency']:4.0f}% "
              f"{a['floor_h']:5.1f}h | {b['walkers']:14d} {b['wall_per_ess_s']:6.2f} {100 * b['efficiency']:4.0f}% "
              f"{b['floor_h']:5.1f}h | {100 * c['busy']:21.0f}% {c['wall_per_ess_s']:6.2f} "
              f"{100 * c['efficiency']:4.0f}% {c['floor_h']:5.1f}h")


# -- main ------------------------------------------------------------------------------------------------
def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--run-file", default=str(REPO / "configs" / "kestrel_demo.toml"),
                    help="run file whose posterior is timed (default: the CAMB demo, configs/kestrel_demo.toml)")
    ap.add_argument("--theory", choices=("camb", "templates"), default="camb",
                    help="templates: the template model with --delay seconds per call instead of --run-file")
    ap.add_argument("--delay", type=float, default=0.2, help="seconds per call of the template model")
    ap.add_argument("--points", type=int, default=8, help="points per batch (default 8)")
    ap.add_argument("--repeats", type=int, default=3, help="timed batches per configuration (default 3)")
    ap.add_argument("--mpi-ranks", type=int, default=3, help="mpiexec -n for the MPI figure (0: skip)")
    ap.add_argument("--chain-steps", default="2000,10000,30000",
                    help="chain lengths for the checkpoint cost (comma-separated; empty: skip)")
    ap.add_argument("--kappa-steps", type=int, default=2000,
                    help="steps of the template run that measures calls per effective sample (0: skip)")
    ap.add_argument("--kappa", type=float, help="calls per effective sample for the model (default: measured)")
    ap.add_argument("--tau", type=float, help="τ_int in steps for the model (default: measured)")
    ap.add_argument("--json", help="also write every figure to this file")
    ap.add_argument("--model-only", nargs=4, type=float, metavar=("T", "O", "CKPT", "CHECK"),
                    help="print only the scaling model, from given seconds per point, per-point overhead, "
                         "checkpoint and check cost per 50 steps (with --kappa and --tau)")
    ap.add_argument("--mpi-child", nargs=4, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.model_only:
        t_, o_, c_, a_ = args.model_only
        kappa, tau = args.kappa or 17.0, args.tau or 16.0
        print_model(scaling_model(t_, o_, c_, a_, kappa=kappa, tau=tau), t_, o_, c_, a_, kappa, tau)
        return 0
    if args.mpi_child:
        return mpi_child(args.mpi_child[0], args.mpi_child[1], int(args.mpi_child[2]), args.mpi_child[3] == "1")

    from infer import config
    from infer.parallel import set_threads
    folder = Path(tempfile.mkdtemp(prefix="infer-bench-"))
    try:
        run_file = Path(args.run_file) if args.theory == "camb" else template_run_file(folder, args.delay)
        cfg = config.load(run_file)
        points = point_cloud(cfg, args.points)
        points_file = folder / "points.npy"
        np.save(points_file, points, allow_pickle=False)
        set_threads(1)          # the driver itself evaluates nothing; keep its BLAS out of the way
        try:
            cores = len(os.sched_getaffinity(0))
        except AttributeError:
            cores = os.cpu_count()
        print(f"load average before: {open('/proc/loadavg').read().split()[0]}" if os.path.exists("/proc/loadavg")
              else "", end="; ")
        print(f"machine: {cores} usable cores; posterior of {run_file.name} (theory {cfg.theory})"
              + f"; batch of {args.points} points, median of {args.repeats}")
        print("walker evaluation:")
        figs = pool_figures(cfg, points, args.repeats)
        if args.mpi_ranks:
            for in_rank in (False, True):
                m = mpi_figures(run_file, points_file, args.repeats, args.mpi_ranks, in_rank=in_rank)
                if m:
                    where = "in the rank" if in_rank else "isolated process"
                    figs[f"MPI -n {args.mpi_ranks}, {where}"] = {"cores": args.mpi_ranks - 1, **m}
        base = figs["1 worker x 1 thread"]["batch_s"]
        print("parallel efficiency  t(1 x 1) / (cores x t):")
        for label, f in figs.items():
            if f["cores"] > 1:
                f["efficiency"] = base / (f["cores"] * f["batch_s"])
                print(f"  {label:<22} {100 * f['efficiency']:5.1f} %  (speed-up {base / f['batch_s']:.2f} on "
                      f"{f['cores']} cores)")
        ref = np.array(figs["1 worker x 1 thread"]["lp"])
        same = {label: bool(np.array_equal(ref, np.array(f["lp"]))) for label, f in figs.items()}
        print("ln p identical bit for bit to 1 worker x 1 thread: "
              + ", ".join(f"{k}: {'yes' if v else 'NO'}" for k, v in same.items()))
        rows = []
        if args.chain_steps:
            print("driver's serial costs per checkpoint (+50 steps; 4 ensembles x 64 walkers, 7 sampled + 8 "
                  "derived) and per convergence check:")
            rows = store_figures([int(s) for s in args.chain_steps.split(",")], folder)
        print("MPI messaging:")
        o = overhead_figure(folder, args.repeats) if args.mpi_ranks else None
        kappa, tau = args.kappa, args.tau
        if args.kappa_steps and (kappa is None or tau is None):
            print("calls per effective sample (Gaussian template posterior):")
            k_meas, tau_meas = kappa_figure(folder, args.kappa_steps, folder)
            kappa = kappa if kappa is not None else k_meas
            tau = tau if tau is not None else tau_meas
        model = []
        if rows and kappa and tau:
            big = max(rows, key=lambda r: r["steps"])
            t = base / args.points
            model = scaling_model(t, o or 0.0, big["checkpoint_s"], big["check_s"], kappa=kappa, tau=tau)
            print_model(model, t, o or 0.0, big["checkpoint_s"], big["check_s"], kappa, tau)
        if args.json:
            Path(args.json).write_text(json.dumps({"pools": figs, "identical": same, "store": rows,
                                                   "overhead_s": o, "kappa": kappa, "tau": tau, "model": model,
                                                   "points": args.points, "theory": args.theory}, indent=1))
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
