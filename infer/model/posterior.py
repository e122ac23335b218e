"""The log-posterior of one run: priors × band-power likelihood of a theory's spectra.

ln p(θ | d) = ln π(θ) + ln L(d | θ) + const (Bayes' theorem). `Posterior` is built from a validated
`Config` in whichever process evaluates it (the driver, a worker process, an MPI rank), so that nothing
but the run file crosses process boundaries. A point outside the prior support never reaches the theory;
a point the theory cannot compute (`TheoryError`) gets −∞ with its reason returned for counting.

Per point the result is ``(ln posterior, blob, reason)`` with ``blob = [ln L, derived..., χ²]``
(`blob_names`), ``reason`` None for a computed point.
"""
from __future__ import annotations

import math

import numpy as np

from infer.data import bandpowers as datasets
from infer.config import Config
from infer.errors import UserError
from infer.model.likelihood import NUISANCE, BandPowerLikelihood
from infer.model.priors import PriorSet
from infer.theory import TheoryError, make_theory


def load_data(cfg: Config):
    """The run's dataset, loaded, validated and cut to the requested spectra and ℓ range."""
    ds = cfg.dataset
    data = datasets.load(ds["file"], covariance=ds.get("covariance"), units=ds.get("units"))
    return data.cut(spectra=ds.get("spectra"), ell_min=ds.get("ell_min"), ell_max=ds.get("ell_max"))


class Posterior:
    def __init__(self, cfg: Config, data=None):
        self.cfg = cfg
        self.data = load_data(cfg) if data is None else data
        self.theory = make_theory(cfg.theory, self.data.ell_max_needed, where=f"{cfg.path}: [theory]")
        self.like = BandPowerLikelihood(self.data)
        self.names = tuple(p.name for p in cfg.sampled)
        self.fixed = cfg.fixed
        self._check_names()
        self.priors = PriorSet(cfg.sampled)
        # A derived value that is also sampled (H0 or theta_star_100, say) would only repeat its input.
        self._derived = tuple(n for n in self.theory.derived_names if n not in self.names)
        self.derived_names = self._derived + ("chi2",)
        self.blob_names = ("log_like",) + self.derived_names
        self._nuisance = [n for n in NUISANCE if n in self.names or n in self.fixed]
        self._inputs = [n for n in self.theory.inputs if n in self.names or n in self.fixed]

    def _check_names(self):
        given = set(self.names) | set(self.fixed)
        inputs = set(self.theory.inputs)
        known = inputs | set(NUISANCE)
        for name in sorted(given - known):
            raise UserError(f"{self.cfg.path}: [parameters.{name}] is not read by theory code "
                            f"'{self.cfg.theory['code']}' nor a nuisance parameter (known: {', '.join(sorted(known))})")
        one_of = tuple(getattr(self.theory, "one_of", ()))
        required = set(getattr(self.theory, "required", set(inputs) - set(one_of)))
        for name in sorted(required - given):
            raise UserError(f"{self.cfg.path}: theory code '{self.cfg.theory['code']}' needs [parameters.{name}] "
                            "(sampled with 'prior' or fixed with 'value')")
        if one_of and sum(n in given for n in one_of) != 1:
            raise UserError(f"{self.cfg.path}: give exactly one of " +
                            ", ".join(f"[parameters.{n}]" for n in one_of))

    def point(self, x: np.ndarray) -> dict[str, float]:
        values = dict(self.fixed)
        values.update(zip(self.names, (float(v) for v in x)))
        return values

    def __call__(self, x: np.ndarray) -> tuple[float, np.ndarray, str | None]:
        blob = np.full(len(self.blob_names), np.nan)
        lp = self.priors.logpdf(np.asarray(x, float))
        if lp == -math.inf:
            return -math.inf, blob, "outside-prior"
        values = self.point(x)
        try:
            spectra = self.theory.compute({k: values[k] for k in self._inputs})
        except TheoryError as err:
            return -math.inf, blob, err.reason
        nuisance = {k: values[k] for k in self._nuisance}
        ll, chi2 = self.like.loglike(spectra, nuisance)
        if not math.isfinite(ll):
            return -math.inf, blob, "non-finite-likelihood"
        blob[0] = ll
        blob[1:-1] = [spectra.derived[n] for n in self._derived]
        blob[-1] = chi2
        return lp + ll, blob, None

    def model_bands(self, x: np.ndarray) -> np.ndarray:
        """Model band powers at one point (for the data-vs-model figure)."""
        values = self.point(x)
        spectra = self.theory.compute({k: values[k] for k in self._inputs})
        return self.like.model(spectra, {k: values[k] for k in self._nuisance})

    def describe(self) -> dict:
        return {"theory": self.theory.describe(), "n_bins": self.like.n, "spectra": list(self.like.kinds)}
