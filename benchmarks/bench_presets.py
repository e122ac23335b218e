"""What the demo's CAMB accuracy preset costs in χ²: Δχ² = χ²(fast) − χ²(standard) on the demo dataset.

Run as ``python benchmarks/bench_presets.py [RUNFILE] [FIT.json] [A B]`` (FIT from ``infer fit RUNFILE --out
FIT.json``; without it the run file's guesses and spreads are used; A and B the presets compared,
default fast and standard: Δχ² = χ²(A) − χ²(B)). Prints Δχ² at the best fit and at
±1σ (Laplace σ) along each sampled parameter, and the shift of the maximum along that axis that the
difference implies, −[Δχ²(+σ) − Δχ²(−σ)]/4 in units of σ (a locally quadratic χ² with unit curvature per σ²;
common practice). A constant Δχ² does not move the posterior; its variation across ±1σ does.
"""
from __future__ import annotations

import json
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def main(argv):
    from infer import config
    from infer.model.posterior import Posterior
    cfg = config.load(argv[0] if argv else ROOT / "configs" / "kestrel_demo.toml")
    pa, pb = (argv[2], argv[3]) if len(argv) > 3 else ("fast", "standard")
    posts = {acc: Posterior(replace(cfg, theory=dict(cfg.theory, accuracy=acc))) for acc in (pa, pb)}
    names = posts["fast"].names
    if len(argv) > 1:
        fit = json.loads(Path(argv[1]).read_text())
        x0 = np.array([fit["best"][n] for n in names])
        sig = np.array([fit["sigma"][n] for n in names])
    else:
        x0 = np.array([p.guess for p in cfg.sampled])
        sig = np.array([p.spread for p in cfg.sampled])
    cost = {}

    def d(x):
        out = {}
        for acc, post in posts.items():
            t = time.perf_counter()
            out[acc] = post(x)[1][-1]
            cost.setdefault(acc, []).append(time.perf_counter() - t)
        return out[pa] - out[pb]

    print(f"Δχ² = χ²({pa}) − χ²({pb}) at the best fit: {d(x0):+.3f}")
    for i, n in enumerate(names):
        e = np.zeros_like(x0)
        e[i] = sig[i]
        dp, dm = d(x0 + e), d(x0 - e)
        print(f"{n:16s} Δχ²(+1σ) {dp:+.3f}  Δχ²(−1σ) {dm:+.3f}  implied shift of the maximum {-(dp - dm) / 4:+.3f} σ")
    f, s = np.median(cost[pa]), np.median(cost[pb])
    print(f"seconds per call (this process's threads): {pa} {f:.2f}, {pb} {s:.2f} (× {s / f:.2f})")


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
