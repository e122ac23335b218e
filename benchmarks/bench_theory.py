"""Seconds per CAMB call of `infer.theory.camb.CambTheory`, by accuracy preset and ℓ_max.

Run as ``python benchmarks/bench_theory.py [--threads N] [--calls K]`` (not collected by pytest). For each
preset and ℓ_max ∈ {1500, 2500} it times the full `compute` (median of K calls after one warm-up, wall and
process CPU seconds), then what σ₈ costs: the same CAMB run with and without the z = 0 matter transfer
function, and the high-precision transfer option we do not use below ``high`` (interleaved pairs, median
of the differences). It also times the
per-call set-up (copy of the prebuilt CAMB parameters + set_cosmology, with H₀ and with θ_* given).

CAMB reads OMP_NUM_THREADS when its library loads; ``--threads`` sets it before that happens. Figures on
a shared machine are noisy: compare medians, and CPU seconds when other jobs compete for the cores.
"""
from __future__ import annotations

import argparse
import math
import os
import statistics
import sys
import time
from pathlib import Path

FID = {"omega_b": 0.0224, "omega_c": 0.120, "H0": 67.4, "ln_As_1e10": math.log(21.0), "n_s": 0.965,
       "tau": 0.054}


def timed(fn, calls: int) -> tuple[float, float]:
    """Median wall and CPU seconds of ``fn()`` over ``calls`` calls, after one warm-up call."""
    fn()
    wall, cpu = [], []
    for _ in range(calls):
        w, c = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - w)
        cpu.append(time.process_time() - c)
    return statistics.median(wall), statistics.median(cpu)


def paired(fn_a, fn_b, calls: int) -> tuple[tuple[float, float], tuple[float, float]]:
    """Cost of ``fn_b`` and the extra cost of ``fn_a`` over it: calls interleaved a, b, a, b … (after a
    warm-up of each) so that drifting machine load cancels; medians of the per-pair differences."""
    fn_a(), fn_b()
    b_w, b_c, d_w, d_c = [], [], [], []
    for _ in range(calls):
        w, c = time.perf_counter(), time.process_time()
        fn_a()
        aw, ac = time.perf_counter() - w, time.process_time() - c
        w, c = time.perf_counter(), time.process_time()
        fn_b()
        bw, bc = time.perf_counter() - w, time.process_time() - c
        b_w.append(bw), b_c.append(bc), d_w.append(aw - bw), d_c.append(ac - bc)
    med = statistics.median
    return (med(b_w), med(b_c)), (med(d_w), med(d_c))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--threads", type=int, default=None, help="OpenMP threads for CAMB (default: environment)")
    ap.add_argument("--calls", type=int, default=3, help="timed calls per figure (after one warm-up)")
    ap.add_argument("--ell-max", type=int, nargs="+", default=[1500, 2500])
    args = ap.parse_args(argv)
    if args.threads is not None:
        os.environ["OMP_NUM_THREADS"] = str(args.threads)
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

    from infer.theory.camb import ACCURACY_PRESETS, CambTheory
    import camb

    threads = os.environ.get("OMP_NUM_THREADS", f"unset ({os.cpu_count()} cores)")
    print(f"CAMB {camb.__version__}; OMP_NUM_THREADS = {threads}; median of {args.calls} calls after a warm-up; "
          f"load average {os.getloadavg()[0]:.1f}")
    print()
    print("compute: the full CambTheory.compute; CAMB run without σ8: no matter transfer at z = 0;")
    print("σ8 extra: what our z = 0 transfer adds to a CAMB run; hi-prec: what CAMB's high-precision transfer")
    print("would add on top (used only by 'high'). Wall / CPU seconds.")
    print()
    print(f"{'accuracy':<9} {'ell_max':>7} | {'compute':>13} | {'CAMB w/o σ8':>13} | {'σ8 extra':>15} "
          f"| {'hi-prec extra':>15}")
    for ell_max in args.ell_max:
        for acc in ACCURACY_PRESETS:
            theory = CambTheory(ell_max, {"accuracy": acc})
            w, c = timed(lambda: theory.compute(FID), args.calls)

            base = theory.camb_params(FID)
            no_tr = base.copy()
            no_tr.WantTransfer = False
            hp_on, hp_off = base.copy(), base.copy()
            hp_on.Transfer.high_precision, hp_off.Transfer.high_precision = True, False
            off, extra = paired(lambda: camb.get_results(base), lambda: camb.get_results(no_tr), args.calls)
            _, hp_extra = paired(lambda: camb.get_results(hp_on), lambda: camb.get_results(hp_off), args.calls)
            print(f"{acc:<9} {ell_max:>7} | {w:>5.2f} / {c:>5.2f} | {off[0]:>5.2f} / {off[1]:>5.2f} | "
                  f"{extra[0]:>+6.2f} / {extra[1]:>+6.2f} | {hp_extra[0]:>+6.2f} / {hp_extra[1]:>+6.2f}",
                  flush=True)

    theory = CambTheory(2000, {"accuracy": "standard"})
    theta_point = {k: v for k, v in FID.items() if k != "H0"}
    theta_point["theta_star_100"] = theory.compute(FID).derived["theta_star_100"]
    n = 20
    w_h0, _ = timed(lambda: theory.camb_params(FID), n)
    w_th, _ = timed(lambda: theory.camb_params(theta_point), n)

    def fresh():
        p = camb.CAMBparams()
        p.set_accuracy(AccuracyBoost=1.0, lAccuracyBoost=1.0)
        p.set_for_lmax(2000, lens_potential_accuracy=1, lens_output_margin=500)
        p.set_matter_power(redshifts=(0.0,), kmax=2.0, silent=True)
        p.set_cosmology(H0=67.4, ombh2=0.0224, omch2=0.12, mnu=0.06, nnu=3.044, TCMB=2.7255, tau=0.054)
        p.InitPower.set_params(As=2.1e-9, ns=0.965)

    w_fresh, _ = timed(fresh, n)
    print()
    print(f"per-call set-up (median of {n}): copy of prebuilt parameters + set_cosmology {1e3 * w_h0:.2f} ms "
          f"with H0, {1e3 * w_th:.2f} ms with theta_star_100 (H0 solve); building from scratch "
          f"{1e3 * w_fresh:.2f} ms")
    return 0


if __name__ == "__main__":
    sys.exit(main())
