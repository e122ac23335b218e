"""A run's posterior as the surrogate engine sees it: exact calls, training targets and the emulated posterior.

The surrogate engine (`infer.sampling.engine`) knows no cosmology; this module supplies what it asks of a
`Problem`:

* ``best_fit(evaluate)`` — the MAP and its Laplace covariance by the damped least-squares fit of
  `infer.fit.bestfit` (Levenberg–Marquardt on the whitened band-power residuals), its exact calls made
  through the engine's ``evaluate`` so that they are logged and replayed like every other exact call;
* ``targets(X, blobs)`` — the *binned theory band powers* B(θ) at exact points, which the exact calls
  return in their blobs (`infer.fit.bands`);
* ``train(X, Y, laplace)`` — a `infer.theory.surrogate.Surrogate` of B(θ_theory) over the sampled inputs
  of the theory only (PCA of the whitened band powers plus the regression chosen by held-out Δχ²), and the
  vectorised surrogate log-posterior built on it: **priors, nuisance terms and the Gaussian likelihood
  stay exact**, only the Boltzmann call is replaced (ln p̃ = ln π(θ) + ln L(d | B̃(θ), nuisance), the
  likelihood's own vectorised `loglike_many`, analytic marginalisation included). Priors on derived
  quantities are not emulated: the importance weights bring them in exactly.

Exact calls use `infer.fit.bands.BandModelFactory` (blob = model band powers, then the theory's derived
values), so one kind of exact call serves the fit, the design, the training and the correction; the
chain-style blob ``[ln L, derived…, χ²]`` of each exact draw is rebuilt from it by `chain_blobs`.
"""
from __future__ import annotations

import numpy as np

from infer.errors import UserError

from infer.fit.bands import BandModelFactory
from infer.sampling.engine import Laplace


class EmulatedProblem:
    """The engine's view of one run (``cfg``); ``model`` is a built `infer.fit.bands.BandModel`."""

    def __init__(self, cfg, model=None, surrogate_options: dict | None = None, fit_starts: int = 1):
        self.cfg = cfg
        self.factory = BandModelFactory(cfg)
        self.model = model if model is not None else self.factory()
        post = self.model.posterior
        self.names = post.names
        self.priors, self.like = post.priors, post.like
        self.lower, self.upper = post.priors.lower, post.priors.upper
        self.n_bands = self.like.n
        inputs = set(post.theory.inputs)
        self.theory_index = np.array([i for i, n in enumerate(self.names) if n in inputs], dtype=int)
        self.nuisance_names = list(post._nuisance)
        self.fixed = dict(post.fixed)
        self.options = dict(surrogate_options or {})
        self.fit_starts = fit_starts
        self.fit_result = None
        self.surrogate = None
        if self.like.low is not None:
            raise UserError(f"{cfg.path}: [likelihood] low_ell = \"hamimeche-lewis\" is not yet supported by "
                            "the surrogate engine (its vectorised likelihood is the Gaussian one); use "
                            "sampling.engine = \"ensemble\" or drop the option")
        L = np.asarray(self.like._chol)
        self._chol = L
        self._data = np.asarray(self.like.data.value, float)

    # -- nuisance terms, vectorised ------------------------------------------------------------------
    def _nuisance(self, X) -> dict[str, np.ndarray]:
        """Per row of X: the value of every nuisance parameter the run gives (sampled or fixed)."""
        X = np.atleast_2d(X)
        return {name: (X[:, self.names.index(name)] if name in self.names else
                       np.full(len(X), float(self.fixed[name]))) for name in self.nuisance_names}

    def model_from_theory(self, X, B):
        """Model bands m (n, N) per row from binned theory B (the `infer.model.nuisance` model)."""
        return self.like.model_many(B, self._nuisance(X))

    def targets(self, X, blobs):
        """Binned theory B (n, N): the first N entries of the exact blobs (`infer.fit.bands`)."""
        return np.asarray(blobs, float)[:, :self.n_bands]

    # -- the engine's stages -----------------------------------------------------------------------
    def best_fit(self, evaluate) -> Laplace:
        from infer.fit import bestfit

        class Logged:
            failures: list = []

            def evaluate(self, points):
                return evaluate(points)

        res = bestfit.fit(self.cfg, starts=self.fit_starts, evaluator=Logged(), model=self.model)
        self.fit_result = res
        mean = np.array([res.best[n] for n in self.names])
        cov = np.array(res.covariance, float)
        cov = 0.5 * (cov + cov.T)
        return Laplace(mean, cov, res.calls, {"converged": res.converged, "reason": res.reason,
                                              "chi2": res.chi2, "at_bound": res.at_bound})

    def train(self, X, Y, laplace: Laplace):
        from infer.theory.surrogate import Surrogate
        idx = self.theory_index
        sur = Surrogate.fit(X[:, idx], Y, self._chol, laplace.mean[idx], laplace.cov[np.ix_(idx, idx)],
                            **self.options)
        self.surrogate = sur
        return self.logpost_function(sur), sur.describe()

    def logpost_function(self, sur):
        """The vectorised surrogate log-posterior ln p̃(X) (n,) for a fitted surrogate."""
        idx, priors, like = self.theory_index, self.priors, self.like

        def logpost(X):
            X = np.atleast_2d(np.asarray(X, float))
            lp = priors.logpdf_many(X)
            ok = np.isfinite(lp)
            out = np.full(len(X), -np.inf)
            if ok.any():
                ll, _ = like.loglike_many(sur.predict_many(X[ok][:, idx]), self._nuisance(X[ok]))
                out[ok] = lp[ok] + ll
            return out
        return logpost

    # -- results in the chain's vocabulary ---------------------------------------------------------------
    def chain_blobs(self, X, log_post, blobs):
        """ln L (n,), derived (n, D) with D = theory derived values then χ², from exact BandModel blobs."""
        blobs = np.asarray(blobs, float)
        X = np.atleast_2d(np.asarray(X, float))
        ok = np.isfinite(log_post)
        chi2 = np.full(len(blobs), np.nan)
        log_like = np.full(len(blobs), np.nan)
        if ok.any():
            log_like[ok], chi2[ok] = self.like.loglike_many(blobs[ok, :self.n_bands], self._nuisance(X[ok]))
        derived = np.concatenate([blobs[:, self.n_bands:], chi2[:, None]], axis=1)
        return log_like, derived

    @property
    def derived_names(self):
        return tuple(self.model.derived_names) + ("chi2",)
