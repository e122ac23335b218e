"""Accuracy and cost of the band-power surrogate (`infer.theory.surrogate`) on the CAMB demo.

Run as ``python benchmarks/bench_surrogate.py [--config configs/kestrel_demo.toml] [--sizes 40,80,150]
[--test 100] [--radius 4] [--pca-tol 1e-4] [--cache FILE]`` (not collected by pytest; one process, one OpenMP thread).

What it does, all with the run file's theory, dataset, windows and fixed parameters:

1. Exact binned band powers B(θ) (calibration 1, no foreground: the nuisance terms stay exact and are
   not emulated) of the *cosmological* sampled parameters only.
2. A Fisher covariance of those parameters from central differences of B at steps of the run file's
   ``spread`` (2P + 1 calls), with the calibration — a nuisance, dB/dc = 2B at c = 1 — and its prior
   included in the Fisher matrix and then marginalised (F = Jᵀ C⁻¹ J + prior; Σ = (F⁻¹) block).
3. Training points: one scrambled Sobol design (`sobol_design`) of max(sizes) points within ``radius`` σ
   of the guess in that metric; the sizes are its nested prefixes. Test points: ``test`` independent
   draws from N(guess, Σ) — where the posterior mass is.
4. For each size and each regression method: the surrogate's own k-fold held-out Δχ² (what it reports),
   Δχ² on the independent test points, and the error it makes in χ² against the data, Δ(χ²) =
   χ²(B_surr) − χ²(B_exact), whose spread/2 is the scatter it adds to importance log-weights.
   Fit seconds and microseconds per `predict` call and per point of `predict_many`.

Total exact calls: 2P + 1 + max(sizes) + test (266 for the defaults). ``--cache FILE`` keeps the exact
band powers (a plain .npz, read with allow_pickle=False) so that the fitting stage can be rerun alone.
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):  # one core: the machine is shared
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402
from scipy import linalg  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
METHODS = ("poly2", "poly3", "gp-se-1", "gp-se-2", "gp-m52-2", "auto")


def exact_calls(args):
    from infer import config
    from infer.model.posterior import Posterior
    from infer.theory.surrogate import sobol_design

    cfg = config.load(args.config)
    post = Posterior(cfg)
    sampled = {p.name: p for p in cfg.sampled}
    names = [n for n in post.names if n in post.theory.inputs]
    nuis = [n for n in post.names if n not in post.theory.inputs]
    inputs = [n for n in post.theory.inputs if n in set(names) | set(post.fixed)]
    calls = [0]

    def bands(theta):
        values = dict(post.fixed)
        values.update(zip(names, map(float, theta)))
        calls[0] += 1
        return post.like.model(post.theory.compute({k: values[k] for k in inputs}))

    guess = np.array([sampled[n].guess for n in names])
    step = np.array([sampled[n].spread for n in names])
    t0 = time.perf_counter()
    b0 = bands(guess)
    print(f"one CAMB call: {time.perf_counter() - t0:.2f} s; {len(names)} emulated inputs {names}; "
          f"nuisance (exact) {nuis}; N = {b0.size} bands", flush=True)
    L = linalg.cholesky(np.asarray(post.data.covariance, float), lower=True)
    cols = []
    for i in range(len(names)):
        e = np.zeros(len(names))
        e[i] = step[i]
        cols.append((bands(guess + e) - bands(guess - e)) / (2 * step[i]))
    J = np.column_stack(cols)
    fisher_cols = [J]
    prior_prec = np.zeros(len(names))
    if "calibration" in nuis:
        fisher_cols.append(2 * b0[:, None])
        prior_prec = np.append(prior_prec, 1 / sampled["calibration"].prior.args[1] ** 2)
    Jw = linalg.solve_triangular(L, np.column_stack(fisher_cols), lower=True)
    F = Jw.T @ Jw + np.diag(prior_prec)
    cov = np.linalg.inv(F)[: len(names), : len(names)]
    print("Fisher σ:", dict(zip(names, np.sqrt(np.diag(cov)).round(6))), flush=True)
    lower = np.array([post.priors.lower[post.names.index(n)] for n in names])
    upper = np.array([post.priors.upper[post.names.index(n)] for n in names])
    X = sobol_design(max(args.sizes), guess, cov, args.radius, lower, upper, seed=args.seed)
    rng = np.random.default_rng(args.seed + 1)
    Xt = rng.multivariate_normal(guess, cov, size=args.test)
    Y, Yt = [], []
    t0 = time.perf_counter()
    for i, x in enumerate(np.vstack([X, Xt])):
        (Y if i < len(X) else Yt).append(bands(x))
        if (i + 1) % 25 == 0:
            print(f"  {i + 1}/{len(X) + len(Xt)} exact calls, {(time.perf_counter() - t0) / (i + 1):.2f} s each",
                  flush=True)
    out = dict(names=np.array(names, dtype="S"), guess=guess, cov=cov, X=X, Y=np.array(Y), Xt=Xt,
               Yt=np.array(Yt), chol=L, data=np.asarray(post.data.value, float), calls=np.array(calls[0]))
    return out


def evaluate(cache, sizes, pca_tol):
    from infer.theory.surrogate import Surrogate

    L, mu, cov, X, Y, Xt, Yt, d = (cache[k] for k in ("chol", "guess", "cov", "X", "Y", "Xt", "Yt", "data"))

    def white(b):
        return linalg.solve_triangular(L, np.atleast_2d(b).T, lower=True).T

    chi2_exact = np.sum(white(d - Yt) ** 2, axis=1)
    print(f"\npca_tol = {pca_tol:g}; CV = the surrogate's own 5-fold held-out Δχ²; test = {len(Xt)} draws from "
          "N(guess, Σ); rms = sqrt(mean Δχ²²)")
    print(f"\n{'n':>4} {'method':>9} {'chosen':>9} {'K':>3} | {'CV rms':>9} {'CV worst':>9} | {'test rms':>9} "
          f"{'test mean':>9} {'test worst':>10} | {'sd Δχ²_d/2':>10} | {'fit s':>6} {'µs/call':>7} {'µs/pt':>6}")
    for n in sizes:
        for method in METHODS:
            t0 = time.perf_counter()
            try:
                s = Surrogate.fit(X[:n], Y[:n], L, mu, cov, method=method, pca_tol=pca_tol, seed=0)
            except ValueError as err:
                print(f"{n:>4} {method:>9}  not feasible: {err}")
                continue
            fit_s = time.perf_counter() - t0
            cv = s.held_out_error()
            pred = s.predict_many(Xt)
            dchi2 = np.sum(white(pred - Yt) ** 2, axis=1)
            dchi2_data = np.sum(white(d - pred) ** 2, axis=1) - chi2_exact
            reps = 2000
            t0 = time.perf_counter()
            for i in range(reps):
                s.predict(Xt[i % len(Xt)])
            us_call = (time.perf_counter() - t0) / reps * 1e6
            big = np.repeat(Xt, 10, axis=0)
            t0 = time.perf_counter()
            s.predict_many(big)
            us_pt = (time.perf_counter() - t0) / len(big) * 1e6
            print(f"{n:>4} {method:>9} {s.method:>9} {s.n_components:>3} | {cv['rms_dchi2']:9.2e} "
                  f"{cv['worst_dchi2']:9.2e} | {np.sqrt(np.mean(dchi2 ** 2)):9.2e} {dchi2.mean():9.2e} "
                  f"{dchi2.max():10.2e} | {np.std(dchi2_data) / 2:10.2e} | {fit_s:6.1f} {us_call:7.0f} "
                  f"{us_pt:6.1f}", flush=True)


def cost_at_p8(n_bands=150, n_train=256):
    """µs per predict call at P = 8, N = 150 (a smooth synthetic B(z); only the cost is of interest)."""
    from infer.theory.surrogate import Surrogate, sobol_design

    P = 8
    ell = np.linspace(30, 2500, n_bands)
    freq = np.linspace(0.5, 2.0, P)

    def bands(z):
        z = np.atleast_2d(z)
        return 1e3 * np.exp(0.05 * z @ np.cos(np.outer(freq, ell / 500.0)) - (ell / 2000.0) ** 2)

    X = sobol_design(n_train, np.zeros(P), np.eye(P), 4.0, seed=3)
    pts = np.random.default_rng(0).normal(size=(1000, P))
    print(f"\ncost at P = {P}, N = {n_bands}, n = {n_train} training points (synthetic smooth B):")
    for method in ("poly2", "poly3", "gp-se-2"):
        t0 = time.perf_counter()
        s = Surrogate.fit(X, bands(X), np.eye(n_bands), np.zeros(P), np.eye(P), method=method)
        fit_s = time.perf_counter() - t0
        t0 = time.perf_counter()
        for x in pts:
            s.predict(x)
        us_call = (time.perf_counter() - t0) / len(pts) * 1e6
        t0 = time.perf_counter()
        s.predict_many(pts)
        us_pt = (time.perf_counter() - t0) / len(pts) * 1e6
        print(f"  {method:>8}: K = {s.n_components:>2}, fit {fit_s:5.1f} s, {us_call:6.0f} µs per predict call, "
              f"{us_pt:5.1f} µs per point of predict_many", flush=True)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default=str(ROOT / "configs" / "kestrel_demo.toml"))
    ap.add_argument("--sizes", default="40,80,150")
    ap.add_argument("--test", type=int, default=100)
    ap.add_argument("--radius", type=float, default=4.0)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--cache", default=None, help="keep/reuse the exact band powers in this .npz file")
    ap.add_argument("--pca-tol", type=float, default=1e-4, help="PCA truncation tolerance (Δχ²)")
    ap.add_argument("--calls-only", action="store_true", help="make the exact calls (and cache), no fits")
    args = ap.parse_args(argv)
    args.sizes = sorted(int(s) for s in args.sizes.split(","))
    cache = None
    if args.cache and Path(args.cache).exists():
        with np.load(args.cache, allow_pickle=False) as f:
            cache = {k: f[k] for k in f.files}
        if len(cache["X"]) < max(args.sizes) or len(cache["Xt"]) != args.test:
            sys.exit(f"{args.cache}: made for other --sizes/--test; remove it or pick another file")
        print(f"exact band powers from {args.cache} ({int(cache['calls'])} CAMB calls when made)")
    if cache is None:
        t0 = time.perf_counter()
        cache = exact_calls(args)
        print(f"{int(cache['calls'])} exact calls in {time.perf_counter() - t0:.0f} s", flush=True)
        if args.cache:
            np.savez(args.cache, **cache)
    if not args.calls_only:
        evaluate(cache, args.sizes, args.pca_tol)
        cost_at_p8()


if __name__ == "__main__":
    main()
