"""The surrogate engine: the exact posterior at little more than one exact call per effective sample.

A surrogate of the expensive part of the posterior is trained on exact calls, its posterior is sampled
cheaply, and independent draws of it are corrected to the *exact* posterior by importance weights. The
steps (each cited where its method comes from):

1. **Laplace approximation.** The problem's best fit (``problem.best_fit``, Levenberg–Marquardt on the
   whitened residuals, `infer.fit`) gives the mode μ and curvature covariance Σ.
2. **Design.** Space-filling points in the Σ-whitened space around μ: a scrambled Sobol sequence (Owen
   1998 scrambling; `scipy.stats.qmc.Sobol`) mapped uniformly into a ball of ``design_radius`` σ, clipped
   into the prior support. Exact calls, in parallel, through the replay log (`infer.sampling.exactlog`).
3. **Surrogate.** ``problem.train(X, Y, laplace)`` fits the surrogate on every finite exact call so far
   (fit, design and correction points: no exact call is thrown away) and returns a vectorised
   surrogate log-posterior s(x). Only the expensive theory is emulated; priors, nuisance terms and the
   likelihood stay exact.
4. **Surrogate chain.** The ensemble driver samples exp s(x) to the stopping targets (R̂, bulk/tail ESS,
   τ-multiple) with an in-memory store — cheap, since a surrogate call costs well under a millisecond.
5. **Correction.** Each round draws ``round_size`` points from the defensive mixture
   q_r = (1 − α) e^{s(x)}/Z_s + α t_ν(x; μ, c²Σ) (Hesterberg 1995, Technometrics 37, 185: the heavy-tailed
   component bounds the weights where the surrogate is too narrow), the surrogate part taken without
   replacement from the surrogate chain thinned by its autocorrelation time. Z_s is estimated with many
   cheap surrogate calls by importance sampling. Exact calls at every draw; the weights of all rounds are
   combined without discarding any draw by the deterministic-mixture ("balance heuristic") weights
   w_i = p(x_i) / Σ_r (n_r/N) q_r(x_i) (Veach & Guibas 1995; Owen & Zhou 2000, JASA 95, 135).
   Diagnostics: the Kish effective sample size (Kish 1965) and the Pareto-smoothed k̂ (Vehtari, Simpson,
   Gelman, Yao & Gabry 2024, JMLR 25, 72). A round whose own k̂ exceeds ``khat_max`` or whose weight ESS
   per exact call is below ``min_ess_per_call`` sends its points to the training set: the surrogate is
   refitted and the chain re-run (refinement).
6. **Stopping.** Surrogate chain converged, weight ESS ≥ the target, k̂ < ``khat_max``; else more rounds,
   up to ``max_exact`` exact calls — a run that stops without meeting them says so and is never
   reported as converged.
7. **Evidence.** ln Z = ln mean_i [p(x_i) / q_mix(x_i)] over the correction draws, with its delta-method
   error (the same importance sampling identity; Z_s enters through the normalised q).

Assumptions: the surrogate-chain draws thinned by τ are treated as independent draws of e^{s}/Z_s (they
are MCMC draws that passed the stopping rule); the error this leaves is of the order of the chain's own
Monte Carlo error and is reported through k̂ and the weight ESS, which a poor proposal cannot pass.
The engine knows no cosmology: a `Problem` supplies the fit, the training targets and the surrogate.
"""
from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special, stats

from infer.analysis import weights as wts
from infer.config import Surrogate
from infer.sampling.exactlog import ExactLog, finite
from infer.theory.surrogate import sobol_design      # pure geometry: a space-filling design

log = logging.getLogger("infer")


#: The engine's settings are the run file's ``[surrogate]`` table (validated in `infer.config`).
EngineSettings = Surrogate


#: Draws one surrogate chain provides, in correction rounds; a new chain (after a refit on every exact
#: point so far) follows when they are used up.
POOL_ROUNDS = 8


@dataclass
class Laplace:
    """Mode and curvature covariance of the exact posterior (from the best fit)."""
    mean: np.ndarray
    cov: np.ndarray
    calls: int = 0
    info: dict = field(default_factory=dict)

    @property
    def chol(self) -> np.ndarray:
        return np.linalg.cholesky(self.cov)


@dataclass
class Round:
    refit: int                         # index of the surrogate that proposed it
    n: int
    start: int                         # index of its first draw among the correction draws
    khat: float
    ess: float
    heldout_rms: float                 # |ln p − s| on this round's exact points (out of sample), RMS
    heldout_worst: float


@dataclass
class EngineResult:
    """The weighted exact sample and its diagnostics. Shapes: (n, P), (n,), (n, B)."""
    position: np.ndarray
    log_post: np.ndarray
    blobs: np.ndarray
    log_weight: np.ndarray             # ln w_i (unnormalised); weights = exp(log_weight − max)
    ess: float
    khat: float
    ln_z: float
    ln_z_err: float
    exact_calls: int                   # every exact call of the run (fit, design, correction)
    theory_calls: int                  # those that reached the expensive theory (not outside the prior)
    rounds: list
    refits: int
    chain: dict                        # the last surrogate chain's verdict figures
    laplace: Laplace
    converged: bool
    missing: list
    stage: str = "done"
    stages: np.ndarray | None = None   # stage code of every exact call (`infer.sampling.exactlog.STAGES`)

    @property
    def weights(self) -> np.ndarray:
        w = np.exp(self.log_weight - np.max(self.log_weight))
        return w / w.sum()

    @property
    def calls_per_effective_sample(self) -> float:
        return self.theory_calls / self.ess if self.ess > 0 else math.inf


# -- proposal densities -------------------------------------------------------------------------------
def t_logpdf(x, mean, chol, dof):
    """Log density of a multivariate Student-t with scale matrix L Lᵀ (vectorised over rows of x)."""
    P = len(mean)
    z = np.linalg.solve(chol, (np.atleast_2d(x) - mean).T).T
    m = np.einsum("ij,ij->i", z, z)
    logdet = np.sum(np.log(np.diag(chol)))
    return (special.gammaln(0.5 * (dof + P)) - special.gammaln(0.5 * dof) - 0.5 * P * math.log(dof * math.pi)
            - logdet - 0.5 * (dof + P) * np.log1p(m / dof))


def t_draws(rng, n, mean, chol, dof):
    z = rng.standard_normal((n, len(mean)))
    g = rng.chisquare(dof, size=n) / dof
    return mean + (z / np.sqrt(g)[:, None]) @ chol.T


class Proposal:
    """q(x) = (1 − α) e^{s(x)}/Z_s + α t(x) for one fitted surrogate (log density, vectorised)."""

    def __init__(self, logpost, ln_zs, laplace: Laplace, s: EngineSettings):
        self.logpost, self.ln_zs = logpost, ln_zs
        self.mean, self.chol = laplace.mean, laplace.chol * s.t_scale
        self.alpha, self.dof = s.defensive_weight, s.t_dof

    def logpdf(self, x):
        a = np.log1p(-self.alpha) + self.logpost(x) - self.ln_zs
        b = math.log(self.alpha) + t_logpdf(x, self.mean, self.chol, self.dof) if self.alpha > 0 else -np.inf
        return np.logaddexp(a, b)


def surrogate_evidence(logpost, chain_draws, laplace, s: EngineSettings, rng):
    """ln Z_s of exp s(x) by importance sampling with cheap surrogate calls from an even mixture of a
    Gaussian fitted to the surrogate chain (covariance ×1.2²) and the Laplace Student-t. Returns
    (ln Z_s, relative error of Z_s)."""
    P = chain_draws.shape[1]
    m = chain_draws.mean(axis=0)
    c = np.cov(chain_draws.T).reshape(P, P) * 1.44 + 1e-300 * np.eye(P)
    cg = np.linalg.cholesky(c)
    ct = laplace.chol * s.t_scale
    n = s.evidence_draws
    k = rng.binomial(n, 0.5)
    x = np.concatenate([m + rng.standard_normal((k, P)) @ cg.T, t_draws(rng, n - k, laplace.mean, ct, s.t_dof)])
    lg = stats.multivariate_normal(m, c, allow_singular=True).logpdf(x)
    lq = np.logaddexp(math.log(0.5) + np.atleast_1d(lg), math.log(0.5) + t_logpdf(x, laplace.mean, ct, s.t_dof))
    lw = logpost(x) - lq
    ln_z, err = wts.log_evidence(lw)
    return ln_z, err


# -- the engine ----------------------------------------------------------------------------------------
class Engine:
    """Runs the stages above for one `Problem` (see `infer.model.emulated`) and an `ExactLog`.

    ``chain_sampler(logpost, laplace, seed, ess_min) -> (draws (n, P) thinned, verdict dict)`` samples the
    surrogate posterior; ``ess_target`` is the weight-ESS target; ``seed`` makes every random choice.
    """

    def __init__(self, problem, exact: ExactLog, settings: EngineSettings, ess_target: float, seed: int,
                 chain_sampler, report=None):
        self.problem, self.exact, self.s = problem, exact, settings
        self.ess_target, self.seed = float(ess_target), int(seed)
        self.chain_sampler = chain_sampler
        self.report = report or (lambda stage, **kw: None)
        self.lower, self.upper = np.asarray(problem.lower, float), np.asarray(problem.upper, float)

    def _rng(self, *key):
        return np.random.default_rng(np.random.SeedSequence([self.seed, 0x5E6, *key]))

    def run(self) -> EngineResult:
        s, P = self.s, len(self.lower)
        self._last_ess = None
        self.report("fit")
        laplace = self.problem.best_fit(lambda pts: self.exact.evaluate(pts, "fit"))
        self.report("design", laplace=laplace)
        design = sobol_design(s.design_size(P), laplace.mean, laplace.cov, s.design_radius, self.lower,
                              self.upper, seed=int(self._rng(1).integers(2**31)))
        self.exact.evaluate(design, "design")
        proposals: list[Proposal] = []
        draws_x, draws_lp, draws_blob, draws_from = [], [], [], []      # correction draws, per round
        rounds: list[Round] = []
        chain, refit = {}, 0
        missing: list[str] = []
        while True:
            rows = self.exact.all_rows()
            ok = finite(rows)
            self.report("train", refit=refit, points=int(ok.sum()))
            logpost, train_info = self.problem.train(rows.position[ok], self.problem.targets(rows.position[ok], rows.blobs[ok]),
                                                     laplace)
            self.report("chain", refit=refit)
            need = POOL_ROUNDS * s.round_size        # independent of the ESS target: a run continued with a
            #                                          larger target repeats the shorter run's calls one for one
            pool, chain = self.chain_sampler(logpost, laplace, int(self._rng(2, refit).integers(2**31)), need)
            ln_zs, zs_err = surrogate_evidence(logpost, pool, laplace, s, self._rng(3, refit))
            proposals.append(Proposal(logpost, ln_zs, laplace, s))
            order = self._rng(4, refit).permutation(len(pool))
            used = 0
            refine = False
            while True:
                if self.exact.calls + s.batch > s.max_exact:
                    missing.append(f"exact-call budget {s.max_exact} reached")
                    break
                rng = self._rng(5, refit, len(rounds))
                size = s.round_size
                n_t = int(rng.binomial(size, s.defensive_weight))
                n_s = size - n_t
                if used + n_s > len(pool):
                    break                                   # this chain's draws are used up: new chain
                x = np.concatenate([pool[order[used:used + n_s]],
                                    t_draws(rng, n_t, laplace.mean, laplace.chol * s.t_scale, s.t_dof)])
                x = x[rng.permutation(len(x))]
                used += n_s
                # The budget may cut a round short: the draws are made at the full size and only a prefix
                # is evaluated (a prefix of a shuffled mixture sample is one too), so a resume with a
                # larger budget replays that prefix and carries on with the same round.
                room = (s.max_exact - self.exact.calls) // s.batch * s.batch
                if room < len(x):
                    x = x[:room]
                    missing.append(f"exact-call budget {s.max_exact} reached")
                self.report("correct", round=len(rounds), calls=self.exact.calls, chain=chain)
                lp, blobs, _ = self.exact.evaluate(x, "correct")
                start = sum(len(d) for d in draws_x)
                draws_x.append(x), draws_lp.append(lp), draws_blob.append(blobs), draws_from.append(refit)
                own = np.where(np.isfinite(lp), lp - proposals[-1].logpdf(x), -np.inf)
                k_own = wts.psis_khat(own)
                ess_own = wts.kish_ess(own)
                both = np.isfinite(lp)
                resid = lp[both] - logpost(x[both])
                resid = resid[np.isfinite(resid)]
                rounds.append(Round(refit, len(x), start, k_own, ess_own,
                                    float(np.sqrt(np.mean(resid ** 2))) if len(resid) else math.nan,
                                    float(np.max(np.abs(resid))) if len(resid) else math.nan))
                lw = self._combined(proposals, draws_x, draws_lp, draws_from)
                ess, khat = wts.kish_ess(lw), wts.psis_khat(lw)
                self._last_ess = ess
                self.report("weights", ess=ess, khat=khat, calls=self.exact.calls)
                if (ess >= self.ess_target and khat < s.khat_max and chain.get("met", False)):
                    missing = []
                    return self._result(laplace, proposals, draws_x, draws_lp, draws_blob, draws_from,
                                        rounds, refit, chain, True, [])
                if missing:
                    break
                if k_own > s.khat_max or ess_own / len(x) < s.min_ess_per_call:
                    refine = True
                    break
            if missing:
                break
            if refine and refit >= s.max_refits:
                missing.append(f"surrogate still poor after {s.max_refits} refinements (round k̂ "
                               f"{rounds[-1].khat:.2f}, weight ESS per call {rounds[-1].ess / rounds[-1].n:.2f})")
                break
            refit += 1
        if not draws_x:
            missing.append("no correction round was made")
            raise RuntimeError("; ".join(missing))
        lw = self._combined(proposals, draws_x, draws_lp, draws_from)
        ess, khat = wts.kish_ess(lw), wts.psis_khat(lw)
        if ess < self.ess_target:
            missing.append(f"weight ESS {ess:.0f} < {self.ess_target:.0f}")
        if not khat < s.khat_max:
            missing.append(f"k̂ {khat:.2f} ≥ {s.khat_max}")
        if not chain.get("met", False):
            missing.append("surrogate chain not converged")
        return self._result(laplace, proposals, draws_x, draws_lp, draws_blob, draws_from, rounds, refit, chain,
                            False, missing)

    @staticmethod
    def _combined(proposals, draws_x, draws_lp, draws_from):
        """Deterministic-mixture log-weights of every correction draw (Owen & Zhou 2000)."""
        x = np.concatenate(draws_x)
        lp = np.concatenate(draws_lp)
        N = len(x)
        per = np.zeros(len(proposals))
        for d, r in zip(draws_x, draws_from):
            per[r] += len(d)
        used = [r for r in range(len(proposals)) if per[r] > 0]
        lq = special.logsumexp(np.stack([math.log(per[r] / N) + proposals[r].logpdf(x) for r in used]), axis=0)
        return np.where(np.isfinite(lp), lp - lq, -np.inf)

    def _result(self, laplace, proposals, draws_x, draws_lp, draws_blob, draws_from, rounds, refit, chain,
                converged, missing) -> EngineResult:
        lw = self._combined(proposals, draws_x, draws_lp, draws_from)
        ln_z, ln_z_err = wts.log_evidence(lw)
        rows = self.exact.all_rows()
        outside = np.array([r == "outside-prior" for r in rows.reasons]) if rows.reasons else np.zeros(len(rows), bool)
        return EngineResult(np.concatenate(draws_x), np.concatenate(draws_lp), np.concatenate(draws_blob), lw,
                            wts.kish_ess(lw), wts.psis_khat(lw), ln_z, ln_z_err, self.exact.calls,
                            int(self.exact.calls - outside.sum()), rounds, refit, chain, laplace, converged,
                            missing, stages=rows.stage)
