"""Model band powers per point, as a picklable posterior factory for any evaluator.

The optimiser needs the band powers at every point (to whiten the residuals d − m), not only ln p. The
blob carries the binned theory B(θ) — the expensive part — and the cheap, exact nuisance model turns it
into the model m(θ) or the whitened residuals wherever they are needed (`residuals`, `model_bands`). `BandModelFactory` is a picklable callable (it holds the validated run settings only); calling it —
once per process: the driver, a worker, an MPI rank — builds a `BandModel`, whose ``__call__(x)`` returns
``(ln p, blob, reason)`` like every posterior of the house, with

    blob = [B_1 … B_N (binned theory band powers, μK², dataset order; no nuisance terms),
            derived values of the theory …]

(`blob_names`). ``reason`` is None for a computed point; a point outside the prior support or one the
theory cannot compute gets ln p = −∞, a NaN blob and its reason, so it is counted and never crashes a fit.

Any evaluator of `infer.parallel` runs it (in this process, in worker processes, on MPI ranks); the
optimiser sees only ``evaluate(points) -> (log_post (n,), blobs (n, B), reasons)``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from infer.theory import TheoryError


class BandModel:
    """ln p and the model band powers of one run at a point (built by `BandModelFactory`)."""

    def __init__(self, cfg):
        from infer.model.posterior import Posterior
        self.posterior = post = Posterior(cfg)         # validates dataset, theory and parameter names
        self.names = post.names
        self.like = post.like
        self.priors = post.priors
        self.n_bands = post.like.n
        self.derived_names = tuple(n for n in post.theory.derived_names if n not in post.names)
        self.blob_names = tuple(f"theory_band_{i}" for i in range(self.n_bands)) + self.derived_names
        self._inputs = post._inputs
        self._nuisance = post._nuisance
        self.n_residuals = post.like.n_residuals

    def nuisance(self, x) -> dict[str, float]:
        values = self.posterior.point(np.asarray(x, float))
        return {k: values[k] for k in self._nuisance}

    def residuals(self, x, blob) -> np.ndarray:
        """Whitened residuals (`n_residuals`,) at ``x`` from its blob: squared norm = the point's χ²."""
        return self.like.whiten_bands(np.asarray(blob[:self.n_bands], float), self.nuisance(x))

    def model_bands(self, x, blob) -> np.ndarray:
        """Model band powers (N,) at ``x`` from its blob (analytic parameters at their conditional best fit)."""
        return self.like.model_from_bands(np.asarray(blob[:self.n_bands], float), self.nuisance(x))

    def __call__(self, x) -> tuple[float, np.ndarray, str | None]:
        x = np.asarray(x, float)
        blob = np.full(len(self.blob_names), np.nan)
        lp = self.priors.logpdf(x)
        if lp == -math.inf:
            return -math.inf, blob, "outside-prior"
        values = self.posterior.point(x)
        try:
            spectra = self.posterior.theory.compute({k: values[k] for k in self._inputs})
        except TheoryError as err:
            return -math.inf, blob, err.reason
        bands = self.like.binned(spectra)
        if not np.all(np.isfinite(bands)):
            return -math.inf, blob, "non-finite-model"
        ll, _ = self.like.loglike_bands(bands, {k: values[k] for k in self._nuisance})
        if not math.isfinite(ll):
            return -math.inf, blob, "non-finite-likelihood"
        blob[:self.n_bands] = bands
        blob[self.n_bands:] = [spectra.derived[n] for n in self.derived_names]
        lp_derived = self.posterior.derived_log_prior(blob[self.n_bands:])
        if lp_derived == -math.inf:
            return -math.inf, blob, "outside-derived-prior"
        return lp + lp_derived + ll, blob, None


@dataclass(frozen=True)
class BandModelFactory:
    """Picklable: holds the validated run settings (a frozen `Config`); ``factory()`` builds a `BandModel`.
    Equal settings give equal factories, so an MPI rank keeps the model it built across sessions."""

    cfg: object

    def __call__(self) -> BandModel:
        return BandModel(self.cfg)
