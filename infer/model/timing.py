"""The cost check of a run: how long a theory call and a likelihood call take at one point.

Reported by ``infer check`` (the likelihood should cost ≲ 1 % of a theory call, so that the sampler's time
is the Boltzmann code's). Wall-clock medians over repeated calls (`time.perf_counter`), which is robust to
the occasional slow call; the likelihood is timed over 20 repeats per theory call. A quick look, not a
benchmark (see ``benchmarks/``).
"""
from __future__ import annotations

import os
import time

import numpy as np


def time_posterior(post, x, calls: int) -> dict:
    """Median seconds of a theory call and of a likelihood + prior call at ``x``, over ``calls`` calls.

    Returns ``{"theory_s", "likelihood_s", "fraction", "calls", "threads"}`` with ``fraction`` the
    likelihood's cost relative to the theory's and ``threads`` the OpenMP setting (or "all")."""
    if not isinstance(calls, int) or calls < 1:
        raise ValueError(f"calls must be a positive integer, got {calls!r}")
    x = np.asarray(x, float)
    inputs, nuisance = post.theory_inputs(x), post.nuisance_values(x)
    theory_t, like_t = [], []
    for _ in range(calls):
        t = time.perf_counter()
        spectra = post.theory.compute(inputs)
        t1 = time.perf_counter()
        for _ in range(20):
            post.like.loglike(spectra, nuisance)
            post.priors.logpdf(x)
        like_t.append((time.perf_counter() - t1) / 20)
        theory_t.append(t1 - t)
    th, lk = float(np.median(theory_t)), float(np.median(like_t))
    return {"theory_s": th, "likelihood_s": lk, "fraction": lk / th if th > 0 else float("inf"),
            "calls": calls, "threads": os.environ.get("OMP_NUM_THREADS", "all")}
