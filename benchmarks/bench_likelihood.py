"""Cost of the multi-frequency likelihood per call, against one theory call, measured in one run.

    python benchmarks/bench_likelihood.py [--calls 2000]

The Merlin demo dataset (configs/merlin_bandpowers.h5: 1050 bands, 3 channels, 21 cross-spectra, 3 beam
modes) with every nuisance term of configs/merlin_demo.toml, in three set-ups:

1. every foreground amplitude sampled (23 nuisance parameters sampled, none analytic);
2. the demo: 12 foreground amplitudes marginalised analytically, 6 instrument parameters sampled;
3. the surrogate engine's hot path: `loglike_many` on batches of 256 points (cost per point).

Printed: median microseconds per call (of 5 repeats of ``--calls`` calls), and the ratio to one CAMB call
at the demo's settings (timed in the same run, median of 3). The likelihood is everything after the
theory: window products, nuisance terms, the analytic marginalisation and the triangular solve.
"""
from __future__ import annotations

import argparse
import re
import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def configs(tmp: Path) -> dict[str, Path]:
    demo = (ROOT / "configs" / "merlin_demo.toml").read_text()
    demo = demo.replace('"data/', f'"{ROOT}/configs/data/').replace('"../chains/', f'"{tmp}/')
    demo = re.sub(r'ell_ranges = .*\n', "", demo)             # all 1050 bands
    sampled = demo.replace("analytic = true\n", "").replace("walkers = 24", "walkers = 48")
    out = {"23 sampled nuisance": tmp / "sampled.toml", "12 analytic + 6 sampled": tmp / "analytic.toml"}
    out["23 sampled nuisance"].write_text(sampled)
    out["12 analytic + 6 sampled"].write_text(demo)
    return out


def per_call(fn, calls: int) -> float:
    times = []
    for _ in range(5):
        t = time.perf_counter()
        for _ in range(calls):
            fn()
        times.append((time.perf_counter() - t) / calls)
    return statistics.median(times)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--calls", type=int, default=2000)
    args = ap.parse_args()
    from infer import config
    from infer.model.posterior import Posterior
    tmp = Path(tempfile.mkdtemp())
    rows, camb_s = [], None
    for label, path in configs(tmp).items():
        post = Posterior(config.load(str(path)))
        x = np.array([p.guess for p in post.cfg.sampled])
        if camb_s is None:
            inputs = post.theory_inputs(x)
            post.theory.compute(inputs)
            camb = []
            for _ in range(3):
                t = time.perf_counter()
                post.theory.compute(inputs)
                camb.append(time.perf_counter() - t)
            camb_s = statistics.median(camb)
        spectra = post.theory.compute(post.theory_inputs(x))
        nuis = post.nuisance_values(x)
        like = post.like
        B = like.binned(spectra)
        t_call = per_call(lambda: like.loglike(spectra, nuis), args.calls)
        n_nuis = len(post._nuisance) + len(post.analytic_names)
        rows.append((label, like.n, n_nuis, t_call))
        X = np.repeat(x[None, :], 256, axis=0) * (1 + 1e-4 * np.random.default_rng(1).standard_normal((256, len(x))))
        Bs = np.repeat(B[None, :], 256, axis=0)
        idx = [post.names.index(n) for n in post._nuisance if n in post.names]
        vals = {n: (X[:, post.names.index(n)] if n in post.names else post.fixed[n]) for n in post._nuisance}
        t_many = per_call(lambda: like.loglike_many(Bs, vals), max(1, args.calls // 200)) / 256
        rows.append((label + ", batch of 256", like.n, n_nuis, t_many))
        del idx
    print(f"one CAMB call (demo settings): {camb_s:.3f} s")
    print(f"{'set-up':<44}{'bands':>7}{'nuisance':>10}{'µs per call':>14}{'of a CAMB call':>16}")
    for label, n, k, t in rows:
        print(f"{label:<44}{n:>7d}{k:>10d}{t * 1e6:>14.1f}{100 * t / camb_s:>15.4f}%")


if __name__ == "__main__":
    main()
