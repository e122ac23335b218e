"""Model band powers per point, as a picklable posterior factory for any evaluator.

The optimiser needs the model band powers m(θ) at every point (to whiten the residuals d − m), not only
ln p. `BandModelFactory` is a picklable callable (it holds the validated run settings only); calling it —
once per process: the driver, a worker, an MPI rank — builds a `BandModel`, whose ``__call__(x)`` returns
``(ln p, blob, reason)`` like every posterior of the house, with

    blob = [m_1 … m_N (model band powers, μK², dataset order), derived values of the theory …]

(`blob_names`). ``reason`` is None for a computed point; a point outside the prior support or one the
theory cannot compute gets ln p = −∞, a NaN blob and its reason, so it is counted and never crashes a fit.

Any evaluator of `infer.parallel` runs it (in this process, in worker processes, on MPI ranks); the
optimiser sees only ``evaluate(points) -> (log_post (n,), blobs (n, B), reasons)``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from infer.model.likelihood import NUISANCE
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
        self.blob_names = tuple(f"band_{i}" for i in range(self.n_bands)) + self.derived_names
        given = set(post.names) | set(post.fixed)
        self._inputs = [n for n in post.theory.inputs if n in given]
        self._nuisance = [n for n in NUISANCE if n in given]

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
        model = self.like.model(spectra, {k: values[k] for k in self._nuisance})
        if not np.all(np.isfinite(model)):
            return -math.inf, blob, "non-finite-model"
        ll = -0.5 * self.like.chi2(model) - self.like.lognorm
        blob[:self.n_bands] = model
        blob[self.n_bands:] = [spectra.derived[n] for n in self.derived_names]
        return lp + ll, blob, None


@dataclass(frozen=True)
class BandModelFactory:
    """Picklable: holds the validated run settings (a frozen `Config`); ``factory()`` builds a `BandModel`.
    Equal settings give equal factories, so an MPI rank keeps the model it built across sessions."""

    cfg: object

    def __call__(self) -> BandModel:
        return BandModel(self.cfg)
