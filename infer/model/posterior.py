"""The log-posterior of one run: priors × band-power likelihood of a theory's spectra.

ln p(θ | d) = ln π(θ) + ln L(d | θ) + const (Bayes' theorem). `Posterior` is built from a validated
`Config`; `PosteriorFactory` is the picklable recipe the evaluators (`infer.parallel`) send to worker
processes and MPI ranks, each of which builds the posterior once. A point outside the prior support never
reaches the theory; a point the theory cannot compute (`TheoryError`) gets −∞ with its reason returned
for counting.

Per point the result is ``(ln posterior, blob, reason)`` with ``blob = [ln L, derived..., χ²]``
(`blob_names`), ``reason`` None for a computed point.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from infer.config import Config
from infer import data as datasets
from infer.errors import UserError
from infer.config import support
from infer.model.likelihood import BandPowerLikelihood, FitQuality
from infer.model.marginal import AnalyticMarginal
from infer.model.priors import DerivedPriors, PriorSet
from infer.theory import TheoryError, make_theory

#: The blob field holding the χ² of the point, and its label.
CHI2, CHI2_TEX = "chi2", r"\chi^2"


def load_data(cfg: Config):
    """The run's dataset, loaded, validated and cut to the requested spectra and ℓ range."""
    ds = cfg.dataset
    data = datasets.load(ds["file"], covariance=ds.get("covariance"), units=ds.get("units"))
    from infer.data import selection
    return selection.cut(data, ds)


class Posterior:
    def __init__(self, cfg: Config, data=None):
        self.cfg = cfg
        self.data = load_data(cfg) if data is None else data
        self.theory = make_theory(cfg.theory, self.data.ell_max_needed, where=f"{cfg.path}: [theory]")
        self.names = tuple(p.name for p in cfg.sampled)
        self.fixed = cfg.fixed
        analytic = cfg.analytic
        marginal = AnalyticMarginal([p.name for p in analytic], [p.prior.args[0] for p in analytic],
                                    [p.prior.args[1] for p in analytic])
        self.like = BandPowerLikelihood(self.data, cfg.sections.get("likelihood"), f"{cfg.path}: [likelihood]",
                                        cfg.sections.get("nuisance"), analytic=marginal)
        self.analytic_names = marginal.names
        self._check_names()
        self.priors = PriorSet(cfg.sampled, where=cfg.path)
        # A derived value that is also sampled (H0 or theta_star_100, say) would only repeat its input.
        self._derived = tuple(n for n in self.theory.derived_names if n not in self.names)
        self.derived_names = self._derived + (CHI2,)
        self.blob_names = ("log_like",) + self.derived_names
        self._nuisance = [n for n in self.like.nuisance.defaults if n in self.names or n in self.fixed]
        self._inputs = [n for n in self.theory.inputs if n in self.names or n in self.fixed]
        self.derived_priors = self._derived_priors(cfg.sections.get("derived") or {})

    def _check_names(self):
        given = set(self.names) | set(self.fixed) | set(self.analytic_names)
        theory, code = self.theory, self.cfg.theory["code"]
        nuisance = self.like.nuisance
        known = set(theory.inputs) | set(nuisance.defaults)
        for name in sorted(given - known):
            raise UserError(f"{self.cfg.path}: [parameters.{name}] is not read by theory code "
                            f"'{code}' nor a nuisance parameter of this dataset and [nuisance] section "
                            f"(known: {', '.join(sorted(known))})")
        for p in self.cfg.parameters:
            if p.name in nuisance.ranges:
                a, b = nuisance.ranges[p.name]
                lo, hi = (p.value, p.value) if p.value is not None else support(p.prior)
                if not (a <= lo and hi <= b):
                    raise UserError(f"{self.cfg.path}: [parameters.{p.name}] must lie within its physical "
                                    f"range [{a:g}, {b:g}] (its {'value' if p.value is not None else 'prior support'} "
                                    f"is [{lo:g}, {hi:g}]; bound it with a uniform prior or 'range')")
        for name in theory.missing_inputs(given):
            raise UserError(f"{self.cfg.path}: theory code '{code}' needs [parameters.{name}] "
                            "(sampled with 'prior' or fixed with 'value')")
        if theory.one_of and len(theory.chosen_inputs(given)) != 1:
            raise UserError(f"{self.cfg.path}: give exactly one of " +
                            ", ".join(f"[parameters.{n}]" for n in theory.one_of))

    def _derived_priors(self, priors: dict) -> DerivedPriors | None:
        for name in priors:
            if name not in self._derived:
                raise UserError(f"{self.cfg.path}: [derived.{name}]: {name} is not a derived quantity of theory "
                                f"code '{self.cfg.theory['code']}' (derived: {', '.join(self._derived) or 'none'})")
        if not priors:
            return None
        self._derived_prior_index = [self._derived.index(n) for n in priors]
        return DerivedPriors(priors, where=self.cfg.path)

    def derived_log_prior(self, derived_values) -> float:
        """ln π of the ``[derived.NAME]`` priors for the theory's derived values (``_derived`` order)."""
        if self.derived_priors is None:
            return 0.0
        return self.derived_priors.logpdf([derived_values[i] for i in self._derived_prior_index])

    # -- one point ---------------------------------------------------------------------------------
    def point(self, x: np.ndarray) -> dict[str, float]:
        values = dict(self.fixed)
        values.update(zip(self.names, (float(v) for v in x)))
        return values

    def theory_inputs(self, x: np.ndarray) -> dict[str, float]:
        """The theory's inputs at ``x`` (sampled and fixed values)."""
        values = self.point(x)
        return {k: values[k] for k in self._inputs}

    def nuisance_values(self, x: np.ndarray) -> dict[str, float]:
        """The nuisance parameters given at ``x`` (the others sit at their defaults)."""
        values = self.point(x)
        return {k: values[k] for k in self._nuisance}

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
        lp_derived = self.derived_log_prior(blob[1:-1])
        if lp_derived == -math.inf:
            return -math.inf, blob, "outside-derived-prior"
        return lp + lp_derived + ll, blob, None

    def model_bands(self, x: np.ndarray) -> np.ndarray:
        """Model band powers at one point (for the data-vs-model figure)."""
        spectra = self.theory.compute(self.theory_inputs(x))
        return self.like.model(spectra, self.nuisance_values(x))

    def analytic_fit(self, x: np.ndarray) -> dict[str, tuple[float, float]]:
        """Conditional best fit and standard deviation of each analytic parameter at ``x`` (one theory call;
        empty without analytic parameters)."""
        if not self.analytic_names:
            return {}
        spectra = self.theory.compute(self.theory_inputs(x))
        return self.like.conditional(self.like.binned(spectra), self.nuisance_values(x))

    def fit_quality(self, x: np.ndarray) -> tuple[np.ndarray, FitQuality]:
        """Model band powers at ``x`` and their fit quality (χ², PTE for N − P dof, χ² per kind), with P
        the number of sampled parameters. One theory call."""
        model = self.model_bands(x)
        return model, self.like.fit_quality(model, len(self.names))

    # -- labels and records ------------------------------------------------------------------------
    @property
    def derived_tex(self) -> dict[str, str]:
        """LaTeX labels of the derived blob fields (the theory's, and χ²)."""
        tex = {n: self.theory.derived_tex[n] for n in self._derived}
        tex[CHI2] = CHI2_TEX
        return tex

    def labels(self) -> dict[str, str]:
        """LaTeX label of every parameter of the run file (``tex``) and every derived quantity."""
        from infer.model.nuisance import tex_label
        own = {p.name: (tex_label(p.name) or p.tex) if p.tex == p.name and p.name in self.like.nuisance.defaults
               else p.tex for p in self.cfg.parameters}
        return own | self.derived_tex

    def describe(self) -> dict:
        return {"theory": self.theory.describe(), "n_bins": self.like.n, "spectra": list(self.like.kinds)}


@dataclass(frozen=True)
class PosteriorFactory:
    """The picklable recipe of a run's posterior for `infer.parallel`: ``factory()`` builds a
    `Posterior` from the validated run settings (equal settings give equal factories, so an MPI rank keeps
    the posterior it built across sessions)."""

    cfg: Config

    def __call__(self) -> Posterior:
        return Posterior(self.cfg)
