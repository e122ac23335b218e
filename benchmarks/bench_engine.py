"""Benchmark (figures, not a test): exact Boltzmann calls per effective sample of the surrogate engine
against plain importance sampling and the plain ensemble sampler, on the CAMB demo and on a non-Gaussian
8-parameter case; its accuracy against an independent exact estimate; wall time with 1 and 2 workers.

    python benchmarks/bench_engine.py [--workdir DIR] [--budget-minutes 35] [--is-draws 800] [--stages ABCDE]

Stages, in priority order (later ones are skipped when the wall-time budget would be exceeded):

A. The demo (configs/kestrel_demo.toml, ``[sampling] engine = "surrogate"``) run by ``python -m infer run``
   to the weight-ESS target 400. Exact calls are the engine's own count from its replay log
   (``theory_calls``: calls that reached CAMB; ``exact_calls``: all, including points outside the prior),
   every stage included (fit, design, correction). Per correction round: k̂, weight ESS per call, and the
   surrogate's error on that round's exact points before they were trained on (held-out |Δ ln p|; Δχ² =
   2|Δ ln p|).
B. ``infer resume CHAIN --config`` (run file with ``ess_above = 1000``) on a copy of A's chain: the run
   file change is allowed by `infer.config.diff`, and the engine's path does not depend on the target, so
   the resumed run replays A's exact calls (checked by the replay log) and goes on to ESS 1000; its counts
   include every call of A.
C. Independent exact estimate: self-normalised importance sampling (Owen 2013, ch. 9) from a multivariate
   Student-t, ν = 4, scale 1.5 × the Laplace covariance of the best fit (`infer.fit.bestfit.fit`, the
   function behind ``infer fit``; taken from A's report, whose fit is the same deterministic call, and its
   calls counted here), exact calls through ``make_evaluator(BandModelFactory(cfg), 2, 1)``. Means and sds
   with their delta-method Monte Carlo errors (`infer.analysis.weights`), Kish ESS (Kish 1965), k̂
   (Vehtari et al. 2024), ln Z of the normalised proposal. This is also the "plain importance sampling from
   the Laplace approximation" column. Its first draws are timed with 1 and then 2 worker processes (the
   same points: a fixed amount of work; the values must agree bit for bit).
D. The non-Gaussian case (configs/kestrel_demo_wide.toml: τ free under uniform [0.01, 0.8], the TT
   point-source amplitude under uniform [0, 200] μK², whose posterior piles up at 0) to ESS 400, the
   exact-call budget capped so that the stage ends in the wall-time budget.
E. (if the budget allows) the demo to ESS 1000 in a fresh run.
T. (only when asked for in --stages) the 1-vs-2-worker timing alone, on fresh draws.

The plain ensemble sampler is NOT rerun (a converged CAMB chain takes hours): its figure, 30 calls per
effective sample with the default moves (99 with the stretch move), is the measurement of
benchmarks/bench_sampling.py on the Fisher-Gaussian stand-in of the demo posterior.

Chain files and logs go to ``--workdir`` (default /tmp/infer-bench-engine); nothing in the repository is
written. One CAMB thread per worker, at most 2 workers.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):  # the machine is shared
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
PLAIN_SAMPLER = {"de-snooker": 30.0, "stretch": 99.0}     # bench_sampling.py, section 4 (not rerun)
T0 = time.monotonic()


def say(*a):
    print(*a, flush=True)


def elapsed() -> float:
    return time.monotonic() - T0


# -- run files --------------------------------------------------------------------------------------------
def derived_run_file(base: Path, out: Path, ess: float, *, max_exact: int | None = None,
                     time_limit: float | None = None) -> Path:
    """A copy of ``base`` for the benchmark: absolute dataset path, the surrogate engine, the given weight-ESS
    target and (optionally) exact-call budget and wall-time limit. Everything else as in ``base``."""
    text = base.read_text()
    text = re.sub(r'(?m)^file\s*=\s*"([^"]+)"', lambda m: f'file = "{(base.parent / m.group(1)).resolve()}"', text,
                  count=1)
    if not re.search(r'(?m)^engine\s*=', text):
        text = text.replace("[sampling]\n", '[sampling]\nengine = "surrogate"\n', 1)
    text = re.sub(r"(?m)^ess_above\s*=\s*[0-9.e+]+", f"ess_above = {ess:g}", text, count=1)
    if time_limit:
        text = text.replace("[stopping]\n", f'[stopping]\ntime_limit = "{int(time_limit)}"\n', 1)
    if max_exact:
        if "[surrogate]\n" in text:
            text = text.replace("[surrogate]\n", f"[surrogate]\nmax_exact = {int(max_exact)}\n", 1)
        else:
            text += f"\n[surrogate]\nmax_exact = {int(max_exact)}\n"
    out.write_text(text)
    return out


def infer_cmd(args, log: Path, timeout: float | None = None) -> tuple[int, float]:
    t = time.monotonic()
    with open(log, "a") as err:
        err.write(f"\n$ python -m infer {' '.join(map(str, args))}\n")
        err.flush()
        try:
            rc = subprocess.run([sys.executable, "-m", "infer", *map(str, args)], stdout=err, stderr=err,
                                timeout=timeout, cwd=ROOT).returncode
        except subprocess.TimeoutExpired:
            rc = -1
    return rc, time.monotonic() - t


def last_lines(log: Path, n=3, pattern="") -> list[str]:
    lines = [ln for ln in log.read_text().splitlines() if pattern in ln]
    return lines[-n:]


# -- an engine run ----------------------------------------------------------------------------------------
def engine_run(label, run_file: Path, chain: Path, log: Path, timeout=None) -> dict:
    from infer.store.enginefile import EngineFile
    if chain.exists():
        chain.unlink()
    say(f"\n[{label}] $ python -m infer run {run_file} --chain {chain}   ({elapsed() / 60:.1f} min into the benchmark)")
    rc, wall = infer_cmd(["run", run_file, "--chain", chain], log, timeout)
    out = {"label": label, "rc": rc, "wall": wall}
    try:
        st = EngineFile(str(chain)).read()
    except Exception as err:                                      # noqa: BLE001 - reported, not hidden
        say(f"[{label}] exit {rc}; cannot read the chain file: {err}")
        return out
    out.update(names=list(st.names), report=st.report, sample=st.sample, calls_done=st.calls_done)
    say(f"[{label}] exit {rc}, {wall:.0f} s wall, {st.calls_done} exact calls in the file")
    if st.report is None:
        say(f"[{label}] no result written: " + " | ".join(last_lines(log, 2)))
    return out


def round_table(rep) -> list[str]:
    rows = [f"    {'round':>5} {'refit':>5} {'draws':>5} {'k̂':>6} {'ESS/call':>8} {'held-out RMS |Δln p|':>20} "
            f"{'worst |Δln p|':>13} {'worst Δχ²':>9}"]
    for i, r in enumerate(rep["rounds"]):
        rows.append(f"    {i:>5} {r['refit']:>5} {r['n']:>5} {r['khat']:>6.2f} {r['ess'] / r['n']:>8.2f} "
                    f"{r['heldout_rms']:>20.3g} {r['heldout_worst']:>13.3g} {2 * r['heldout_worst']:>9.3g}")
    return rows


def describe_run(res) -> None:
    rep = res.get("report")
    if not rep:
        return
    say(f"    converged {rep['converged']}{'' if rep['converged'] else ' — missing: ' + '; '.join(rep['missing'])}")
    say(f"    exact calls {rep['exact_calls']} (theory {rep['theory_calls']}; by stage {rep['stages']}; fit "
        f"{rep['fit_calls']}), weight ESS {rep['ess']:.0f}, k̂ {rep['khat']:.3f}, refinements {rep['refits']}, "
        f"{rep['calls_per_effective_sample']:.2f} calls per effective sample")
    say(f"    ln Z = {rep['ln_z']:.3f} ± {rep['ln_z_err']:.3f}; engine {rep['seconds']:.0f} s, command "
        f"{res['wall']:.0f} s wall")
    ch = rep.get("surrogate_chain", {})
    say(f"    last surrogate chain: met {ch.get('met')}, R̂max {ch.get('rhat_max', math.nan):.4f}, ESSmin "
        f"{ch.get('ess_min', math.nan):.0f}, τmax {ch.get('tau_max', math.nan):.1f}, {ch.get('steps')} steps, "
        f"pool {ch.get('pool')}")
    sur = rep.get("surrogate", {})
    say("    surrogate: " + ", ".join(f"{k} {v}" for k, v in sur.items() if not isinstance(v, (list, dict)))[:400])
    lap = rep.get("laplace", {})
    say(f"    Laplace: converged {lap.get('converged')}, χ² {lap.get('chi2')}, at bound {lap.get('at_bound')}, "
        f"reason {lap.get('reason')}")
    for line in round_table(rep):
        say(line)


def weighted_summary(x, lw):
    """Means, sds and their Monte Carlo errors (delta method) of a weighted sample."""
    from infer.analysis import weights as wts
    m = wts.weighted_mean(x, lw)
    sd = wts.weighted_sd(x, lw)
    m_err = wts.mcse_weighted_mean(x, lw)
    v_err = wts.mcse_weighted_mean((x - m) ** 2, lw)
    return m, sd, m_err, v_err / (2 * sd)                           # σ(sd) ≈ σ(var) / (2 sd)


# -- plain importance sampling ----------------------------------------------------------------------------
def plain_is(run_file: Path, laplace_mean, laplace_cov, n_draws, timing_calls, seed, cache: Path) -> dict:
    from infer import config
    from infer.analysis import weights as wts
    from infer.fit.bands import BandModelFactory
    from infer.parallel import make_evaluator
    from infer.sampling.engine import t_draws, t_logpdf
    cfg = config.load(str(run_file))
    factory = BandModelFactory(cfg)
    mean, cov = np.asarray(laplace_mean), np.asarray(laplace_cov)
    chol = np.linalg.cholesky(cov) * 1.5
    rng = np.random.default_rng([seed, 0xB15])
    X = t_draws(rng, n_draws, mean, chol, 4.0)
    out = {"timing": {}}
    warm = 2
    fixed = X[warm:warm + timing_calls]
    for workers in (1, 2):
        ev = make_evaluator(factory, workers, 1)
        try:
            ev.evaluate(X[:warm])                               # start-up: processes, model, first CAMB call
            t = time.monotonic()
            lp_fixed, _, _ = ev.evaluate(fixed)
            out["timing"][workers] = time.monotonic() - t
            out[f"lp_fixed_{workers}"] = lp_fixed
            say(f"[C] {len(fixed)} fixed exact calls with {workers} worker{'s' if workers > 1 else ''}: "
                f"{out['timing'][workers]:.1f} s ({out['timing'][workers] / len(fixed):.2f} s per call)")
            if workers == 2:
                lp = np.empty(n_draws)
                blobs = None
                done = 0
                chunk = 64
                t = time.monotonic()
                while done < n_draws:
                    b = min(n_draws, done + chunk)
                    l, bl, _ = ev.evaluate(X[done:b])
                    lp[done:b] = l
                    blobs = bl if blobs is None else np.concatenate([blobs, bl])
                    done = b
                    np.savez(cache, X=X[:done], lp=lp[:done])
                    say(f"[C] {done}/{n_draws} exact calls ({(time.monotonic() - t) / done:.2f} s each, "
                        f"{elapsed() / 60:.1f} min into the benchmark)")
                out["wall"] = time.monotonic() - t
        finally:
            ev.close()
    out["same_values"] = bool(np.array_equal(out["lp_fixed_1"], out["lp_fixed_2"])
                              and np.array_equal(out["lp_fixed_2"], lp[warm:warm + timing_calls]))
    lw = np.where(np.isfinite(lp), lp - t_logpdf(X, mean, chol, 4.0), -np.inf)
    out.update(X=X, lp=lp, lw=lw, ess=wts.kish_ess(lw), khat=wts.psis_khat(lw), ln_z=wts.log_evidence(lw),
               outside=int(np.sum(~np.isfinite(lp))))
    return out


def timing_only(run_file: Path, laplace_mean, laplace_cov, n, seed) -> dict:
    """Wall time of the same n exact calls (Student-t draws around the Laplace mean) with 1 and 2 workers."""
    from infer import config
    from infer.fit.bands import BandModelFactory
    from infer.parallel import make_evaluator
    from infer.sampling.engine import t_draws
    cfg = config.load(str(run_file))
    factory = BandModelFactory(cfg)
    X = t_draws(np.random.default_rng([seed, 0x71E]), n + 2, np.asarray(laplace_mean),
                np.linalg.cholesky(np.asarray(laplace_cov)) * 1.5, 4.0)
    out, vals = {}, {}
    for workers in (1, 2):
        ev = make_evaluator(factory, workers, 1)
        try:
            ev.evaluate(X[:2])                                    # start-up and first call
            t = time.monotonic()
            vals[workers] = ev.evaluate(X[2:])[0]
            out[workers] = time.monotonic() - t
        finally:
            ev.close()
        say(f"[T] {n} fixed exact calls with {workers} worker(s): {out[workers]:.1f} s (load {os.getloadavg()[0]:.2f})")
    out["same"] = bool(np.array_equal(vals[1], vals[2]))
    return out


# -- main -------------------------------------------------------------------------------------------------
def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--demo", default=str(ROOT / "configs" / "kestrel_demo.toml"))
    ap.add_argument("--wide", default=str(ROOT / "configs" / "kestrel_demo_wide.toml"))
    ap.add_argument("--workdir", default="/tmp/infer-bench-engine")
    ap.add_argument("--budget-minutes", type=float, default=35.0)
    ap.add_argument("--is-draws", type=int, default=800)
    ap.add_argument("--timing-calls", type=int, default=64)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--stages", default="ABCDE", help="letters of the stages to run (see the docstring; T: the "
                    "1-vs-2-worker timing alone)")
    ap.add_argument("--s-per-call", type=float, default=1.15, help="wall seconds per exact call assumed for the "
                    "budget when stage A is not run")
    args = ap.parse_args(argv)
    budget = 60 * args.budget_minutes
    wd = Path(args.workdir)
    wd.mkdir(parents=True, exist_ok=True)
    log = wd / "infer.log"
    demo, wide = Path(args.demo), Path(args.wide)
    say(f"bench_engine: {time.strftime('%Y-%m-%d %H:%M:%S %Z')}, {os.cpu_count()} cores, load "
        f"{os.getloadavg()[0]:.2f}, budget {args.budget_minutes:.0f} min, workdir {wd}, log {log}")
    say("the machine is shared: wall times include other users' load")

    from infer import config
    from infer.store.enginefile import EngineFile
    stages = set(args.stages.upper())
    # A. the demo to ESS 400 (without A in --stages: the chain file of an earlier A in the workdir)
    f400 = derived_run_file(demo, wd / "demo-400.toml", 400)
    f1000 = derived_run_file(demo, wd / "demo-1000.toml", 1000)
    if "A" in stages:
        A = engine_run("A demo ESS 400", f400, wd / "demo-400.h5", log)
        describe_run(A)
    elif (wd / "demo-400.h5").exists():
        st = EngineFile(str(wd / "demo-400.h5")).read()
        A = {"label": "A (earlier run)", "rc": 0, "wall": st.report["seconds"] if st.report else math.nan,
             "names": list(st.names), "report": st.report, "sample": st.sample, "calls_done": st.calls_done}
        say(f"\n[A] the earlier ESS-400 demo run in {wd / 'demo-400.h5'} (not rerun)")
    else:
        A = {}
    rep = A.get("report")
    s_per_call = A["wall"] / max(1, A["calls_done"]) if rep and math.isfinite(A["wall"]) else args.s_per_call
    say(f"    {s_per_call:.2f} s of wall time per exact call (2 workers) assumed for the budget")
    if rep is None and stages & set("BCE"):
        say("no demo result (stage A); stages B, C, E need it")
        stages -= set("BCE")

    # B. resume to ESS 1000 over A's calls (on a copy of A's chain file)
    B = None
    if "B" in stages:
        copy = wd / "demo-resume.h5"
        shutil.copyfile(wd / "demo-400.h5", copy)
        refused, allowed = config.diff(config.load(str(f400)), config.load(str(f1000)))
        say(f"\n[B] config.diff(ESS 400 file, ESS 1000 file): refused {refused}, allowed {allowed}")
        left = max(60.0, budget - elapsed())
        say(f"[B] $ python -m infer resume {copy} --config {f1000}   (timeout {left:.0f} s)")
        before = EngineFile(str(copy)).read().calls_done
        rc, wall = infer_cmd(["resume", copy, "--config", f1000], log, timeout=left)
        after = EngineFile(str(copy)).read()
        B = {"rc": rc, "wall": wall, "before": before, "after": after.calls_done, "report": after.report,
             "sample": after.sample, "names": list(after.names),
             "error": " | ".join(last_lines(log, 1, "infer: "))}
        say(f"[B] exit {rc} after {wall:.0f} s; exact calls in the file {before} → {after.calls_done}; last log "
            f"line: {B['error']}")
        if rc == 0:
            describe_run(B)

    # C. plain importance sampling (independent exact estimate) and the 1-vs-2-worker timing
    est = (args.is_draws + 2 * args.timing_calls + 4) * s_per_call
    C = None
    if "C" not in stages:
        pass
    elif elapsed() + est < budget:
        say(f"\n[C] plain importance sampling: {args.is_draws} draws of t_4(Laplace mean, (1.5)² Laplace cov), "
            f"about {est / 60:.0f} min")
        C = plain_is(f400, rep["laplace_mean"], rep["laplace_cov"], args.is_draws, args.timing_calls, args.seed,
                     wd / "plain-is.npz")
        C["calls"] = args.is_draws + rep["fit_calls"]
        say(f"[C] Kish ESS {C['ess']:.0f} from {args.is_draws} draws ({C['outside']} outside the prior), k̂ "
            f"{C['khat']:.3f}, ln Z {C['ln_z'][0]:.3f} ± {C['ln_z'][1]:.3f}; values identical with 1 and 2 "
            f"workers: {C['same_values']}")
    else:
        say(f"\n[C] skipped: about {est / 60:.0f} min left over the budget")

    # D. the non-Gaussian case to ESS 400
    D = None
    left = budget - elapsed()
    cap = int(max(0, left - 60) / max(s_per_call, 0.3))
    if "D" not in stages:
        pass
    elif cap >= 300:
        cap = min(cap, 1500)
        fw = derived_run_file(wide, wd / "wide-400.toml", 400, max_exact=cap, time_limit=left)
        say(f"\n[D] non-Gaussian 8-parameter case, exact-call budget {cap} (what the wall-time budget allows)")
        D = engine_run("D wide ESS 400", fw, wd / "wide-400.h5", log, timeout=left + 120)
        describe_run(D)
    else:
        say(f"\n[D] skipped: only {left / 60:.0f} min left")

    # E. the demo to ESS 1000 in a fresh run, if it fits
    E = None
    est = 1250 * s_per_call
    if "E" not in stages:
        pass
    elif elapsed() + est < budget:
        E = engine_run("E demo ESS 1000", f1000, wd / "demo-1000.h5", log, timeout=budget - elapsed() + 300)
        describe_run(E)
    else:
        say(f"\n[E] fresh demo run to ESS 1000 skipped: about {est / 60:.0f} min, {max(0, budget - elapsed()) / 60:.0f} "
            "min left in the budget")

    # T. (alone) the 1-vs-2-worker timing of a fixed set of exact calls at demo draws
    T = None
    if "T" in stages and rep is not None:
        T = timing_only(f400, rep["laplace_mean"], rep["laplace_cov"], args.timing_calls, args.seed)

    # -- the comparison and the table ----------------------------------------------------------------
    names = A.get("names", [])
    if C is not None:
        say("\naccuracy on the demo: engine (A; weighted exact sample) against plain importance sampling (C)")
        say(f"  {'parameter':<15} {'engine mean':>13} {'IS mean':>13} {'shift/σ':>8} {'±MC':>6} | {'engine sd':>11} "
            f"{'IS sd':>11} {'sd ratio':>8} {'±MC':>6}")
        for lab, R in (("A", A), ("B", B), ("E", E)):
            if R is None or not R.get("report"):
                continue
            s = R["sample"]
            me, se, mee, see = weighted_summary(s["position"], s["log_weight"])
            mi, si, mie, sie = weighted_summary(C["X"], C["lw"])
            say(f"  -- run {lab} (weight ESS {R['report']['ess']:.0f}) vs IS (Kish ESS {C['ess']:.0f})")
            worst_shift = worst_ratio = 0.0
            for i, nm in enumerate(names):
                shift = (me[i] - mi[i]) / si[i]
                sh_err = math.hypot(mee[i], mie[i]) / si[i]
                ratio = se[i] / si[i]
                r_err = ratio * math.hypot(see[i] / se[i], sie[i] / si[i])
                worst_shift, worst_ratio = max(worst_shift, abs(shift)), max(worst_ratio, abs(ratio - 1))
                say(f"  {nm:<15} {me[i]:>13.6g} {mi[i]:>13.6g} {shift:>+8.3f} {sh_err:>6.3f} | {se[i]:>11.4g} "
                    f"{si[i]:>11.4g} {ratio:>8.3f} {r_err:>6.3f}")
            say(f"  largest |shift| {worst_shift:.3f} σ (target < 0.1), largest |sd ratio − 1| {worst_ratio:.3f} "
                "(target < 0.05); the ±MC columns are the combined Monte Carlo errors of the two estimates")
            say(f"  ln Z: engine {R['report']['ln_z']:.3f} ± {R['report']['ln_z_err']:.3f}, IS {C['ln_z'][0]:.3f} ± "
                f"{C['ln_z'][1]:.3f}")

    say("\nexact (CAMB) calls per effective sample — every call of the run counted")
    say(f"  {'case':<40} {'plain sampler':>14} {'plain IS (Laplace t)':>21} {'engine ESS 400':>15} {'engine ESS 1000':>16}")

    def cpe(R):
        if R is None or not R.get("report"):
            return "—"
        r = R["report"]
        return f"{r['calls_per_effective_sample']:.2f}" + ("" if r["converged"] else " (n.c.)")
    is_col = f"{C['calls'] / C['ess']:.2f}" if C is not None else "—"
    say(f"  {'demo, 6 sampled':<40} {PLAIN_SAMPLER['de-snooker']:>11.0f} (*) {is_col:>21} {cpe(A):>15} "
        f"{cpe(B if B and B.get('rc') == 0 else E):>16}")
    say(f"  {'non-Gaussian, 8 sampled':<40} {'—':>14} {'— (issue: ESS 2/437)':>21} {cpe(D):>15} {'—':>16}")
    say(f"  (*) not rerun: bench_sampling.py on the Fisher-Gaussian stand-in, default moves "
        f"(stretch move: {PLAIN_SAMPLER['stretch']:.0f})")
    if C is not None:
        say(f"  plain IS: {args.is_draws} draws + {rep['fit_calls']} fit calls = {C['calls']} calls, Kish ESS "
            f"{C['ess']:.0f}, k̂ {C['khat']:.2f}")
        t1, t2 = C["timing"][1], C["timing"][2]
        say(f"\nwall time for {args.timing_calls} fixed exact calls: 1 worker {t1:.1f} s, 2 workers {t2:.1f} s, "
            f"ratio {t1 / t2:.2f} (2 cores shared with other users)")
    if T is not None:
        say(f"\nwall time for {args.timing_calls} fixed exact calls (stage T): 1 worker {T[1]:.1f} s, 2 workers "
            f"{T[2]:.1f} s, ratio {T[1] / T[2]:.2f}; values identical: {T['same']}")
    if B is not None:
        say(f"\nresume to ESS 1000 over the ESS-400 chain: exit {B['rc']}, calls {B['before']} → {B['after']}: "
            f"{B['error']}")
    say(f"\nbenchmark wall time {elapsed() / 60:.1f} min")
    with open(wd / "figures.json", "w") as f:
        json.dump({"A": A.get("report"), "B": B.get("report") if B else None, "T": T,
                   "D": D.get("report") if D else None, "E": E.get("report") if E else None,
                   "C": {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in (C or {}).items()
                         if k not in ("X", "lp", "lw") and not k.startswith("lp_fixed")}},
                  f, indent=1, default=str)
    return 0


if __name__ == "__main__":
    sys.exit(main())
