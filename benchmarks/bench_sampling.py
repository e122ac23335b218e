"""Benchmark (figures, not a test): cost of the likelihood, of the driver's bookkeeping, and of sampling
the demo problem, each relative to one theory call.

    python benchmarks/bench_sampling.py [configs/kestrel_demo.toml]

1. Seconds per CAMB call at the run's settings (median of a few calls after a warm-up).
2. Likelihood time per call (windows + triangular solve + priors) as a fraction of a theory call.
3. Driver bookkeeping per posterior call (emcee's moves, our buffers, checkpoints, convergence checks):
   measured on the template model in-process, where the posterior itself is cheap and timed separately.
4. Theory calls per effective sample on the demo problem: the demo posterior is replaced by its Fisher
   (Gaussian) approximation — F from central differences of the CAMB band powers (Tegmark, Taylor &
   Heavens 1997, ApJ 480, 22) plus the Gaussian priors — and sampled with the demo's ensembles, walkers
   and moves; calls per effective sample = posterior calls / smallest bulk ESS (Vehtari et al. 2021).
"""
from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import emcee
import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests"))

from infer import config
from infer.analysis import diagnostics  # noqa: E402
from infer.cli import main  # noqa: E402
from infer.model.posterior import Posterior  # noqa: E402
from infer.forecast.fisher import numerical_fisher  # noqa: E402
from infer.sampling.moves import make_moves  # noqa: E402


def median_time(fn, n):
    out = []
    for _ in range(n):
        t = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t)
    return float(np.median(out))


def fisher_gaussian(post, cfg):
    x0 = np.array([p.guess for p in cfg.sampled])
    h = np.array([0.5 * p.spread for p in cfg.sampled])
    result = numerical_fisher(post.model_bands, x0, h, post.data.covariance, names=post.names, max_halvings=2)
    print("   Fisher step check: " + "; ".join(result.summary().splitlines()))
    fisher = np.array(result.matrix)
    for i, p in enumerate(cfg.sampled):          # Gaussian priors add their precision
        if p.prior.kind != "uniform":
            fisher[i, i] += 1.0 / p.prior.args[1] ** 2
    return x0, np.linalg.inv(fisher)


def calls_per_ess(cov, cfg, moves, steps=4000, seed=1):
    P = len(cov)
    prec = np.linalg.inv(cov)

    def logp(x):
        return -0.5 * np.einsum("...i,ij,...j->...", x, prec, x)

    E, W = cfg.sampling.ensembles, cfg.sampling.walkers
    chains = []
    chol = np.linalg.cholesky(cov)
    for e in range(E):
        rng = np.random.default_rng([seed, e])
        start = (chol @ rng.standard_normal((P, W))).T * 0.1
        s = emcee.EnsembleSampler(W, P, logp, vectorize=True, moves=make_moves(moves))
        s._random.seed(seed + e)
        s.run_mcmc(start, steps, progress=False)
        chains.append(s.get_chain())
    chain = np.stack(chains, axis=1)                              # (T, E, W, P)
    tau = max(d["tau"] for d in diagnostics.all_diagnostics(chain, [str(i) for i in range(P)]).values())
    kept = chain[diagnostics.burn_in(tau, steps):]
    per = diagnostics.all_diagnostics(kept, [str(i) for i in range(P)])
    ess = min(min(d["ess_bulk"], d["ess_tail"]) for d in per.values())
    return kept.shape[0] * E * W / ess, tau


def bookkeeping_per_call():
    from conftest import make_quick_dataset, quick_config_text
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        data = make_quick_dataset(tmp / "q.h5")
        cfg_path = tmp / "q.toml"
        cfg_path.write_text(quick_config_text(data, tmp / "c.h5", steps=600, check_every=50,
                                              checkpoint_steps=50))
        cfg = config.load(cfg_path)
        post = Posterior(cfg)
        x = np.array([p.guess for p in cfg.sampled])
        per_post = median_time(lambda: [post(x) for _ in range(500)], 5) / 500
        t = time.perf_counter()
        main(["--quiet", "run", str(cfg_path)])
        total = time.perf_counter() - t
        calls = 600 * cfg.sampling.ensembles * cfg.sampling.walkers
        return total / calls - per_post, per_post


def main_bench(path):
    cfg = config.load(path)
    post = Posterior(cfg)
    x = np.array([p.guess for p in cfg.sampled])
    values = {k: v for k, v in post.point(x).items() if k in post.theory.inputs}
    post.theory.compute(values)
    theory = median_time(lambda: post.theory.compute(values), 3)
    spectra = post.theory.compute(values)
    like = median_time(lambda: [post.like.loglike(spectra), post.priors.logpdf(x)], 200)
    print(f"run file: {path}  ({len(post.names)} sampled, {post.like.n} bands, ℓ ≤ {post.data.ell_max_needed})")
    print(f"1. theory: {theory:.2f} s per CAMB call (accuracy {cfg.theory.get('accuracy')})")
    print(f"2. likelihood + priors: {like * 1e3:.3f} ms per call = {100 * like / theory:.4f} % of a theory call")
    book, quick_post = bookkeeping_per_call()
    print(f"3. driver bookkeeping: {book * 1e3:.3f} ms per posterior call (template model, {quick_post * 1e3:.3f} "
          f"ms per posterior) = {100 * book / theory:.4f} % of a theory call; "
          f"likelihood + bookkeeping = {100 * (like + book) / theory:.3f} % (goal ≤ 1 %)")
    _, cov = fisher_gaussian(post, cfg)
    for moves in ("de-snooker", "stretch"):
        cpe, tau = calls_per_ess(cov, cfg, moves)
        print(f"4. demo problem (Fisher-Gaussian, {cfg.sampling.ensembles} × {cfg.sampling.walkers} walkers, "
              f"moves {moves}): τ = {tau:.1f} steps, {cpe:.1f} theory calls per effective sample "
              f"= {cpe * theory / 60:.1f} min of one core per effective sample")


if __name__ == "__main__":
    main_bench(sys.argv[1] if len(sys.argv) > 1 else str(HERE.parent / "configs" / "kestrel_demo.toml"))
