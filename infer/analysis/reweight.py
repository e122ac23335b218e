"""Importance reweighting of a finished chain to a changed posterior (``infer reweight``).

Method: importance sampling with the chain as the proposal (e.g. Owen 2013, *Monte Carlo theory, methods
and examples*, ch. 9; Gelman et al. 2013, *Bayesian Data Analysis*, 3rd ed., §10.4). Draws x_i of a
chain that targets p_o, with weights w_i (equal for an ensemble chain's draws; the surrogate engine's
importance weights for its exact sample), represent a target p_t through the weights

    w'_i = w_i · p_t(x_i) / p_o(x_i),   ln w'_i = ln w_i + ln p_t(x_i) − ln p_o(x_i)

(unnormalised densities suffice: the estimates are self-normalised). This is exact in the limit of many
draws when p_t is zero wherever p_o is, and practical when p_t is not much narrower than p_o: the weights'
Kish effective sample size (Kish 1965) says how many equally weighted draws they are worth, and the Pareto
k̂ of their tail (PSIS; Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25, 72) whether their variance
is finite (k̂ < 0.7). A reweighting is refused, with nothing written, when k̂ > 0.7 or the ESS is below a
floor (`MIN_ESS`, ``--min-ess``).

The change (`Change`):

* added priors (`AddedPrior`, ``--prior NAME=normal:MEAN,SD`` or ``NAME=uniform:LO,HI``) on any sampled
  or derived quantity: p_t = p_o × π_added; no theory call;
* a target run file whose posterior replaces the chain's. When its dataset (path, selection and SHA-256
  of the bytes), theory settings, likelihood options and fixed values are the chain's, only its priors
  differ and ln p_t = ln π_t + the stored ln L: no theory call. Otherwise (another dataset, another theory
  accuracy) ln p_t is computed exactly at every draw through the evaluators (`infer.parallel`: this
  process, worker processes or MPI ranks);
* a run file whose dataset is *added* (``--add``; an independent dataset): ln p_t = ln p_o + ln L_new,
  exact calls of the new dataset's likelihood.

The sampled parameter space cannot change: the target must sample the same parameters with the same fixed
values, and its prior support may not reach beyond the chain's (the chain has no draws there, and no
weight can make up for them; a narrower support is a cut inside the space and is allowed).

Draws: an ensemble chain's post-burn-in steps (the one burn-in rule, `infer.analysis.burnin.choose`, as
the summary uses it), thinned by the largest integrated autocorrelation time τ so that the draws are close
to independent — the Monte Carlo errors of the weighted summary (`infer.analysis.weighted`) assume
independent draws, and every exact call is spent on a draw that carries new information. A surrogate
engine's exact sample is taken whole, with its weights.
"""
from __future__ import annotations

import hashlib
import logging
import math
import re
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from infer.analysis import burnin
from infer.analysis import weights as wts
from infer.analysis.weighted import KHAT_MAX
from infer.errors import UserError

log = logging.getLogger("infer")

#: Smallest Kish effective sample size of usable weights (``--min-ess``).
MIN_ESS = 100.0
_NUMBER = r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"
_PRIOR = re.compile(rf"([A-Za-z][A-Za-z0-9_]*)=(normal|uniform):({_NUMBER}),({_NUMBER})")


# -- added priors --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class AddedPrior:
    """An independent prior density multiplied into the posterior: normal (mean, sd) or uniform (lo, hi)."""
    name: str
    kind: str
    a: float
    b: float

    def log_density(self, values) -> np.ndarray:
        """ln π(v), normalised; −∞ outside a uniform range (and for non-finite values)."""
        v = np.asarray(values, float)
        if self.kind == "normal":
            out = -0.5 * ((v - self.a) / self.b) ** 2 - math.log(self.b * math.sqrt(2 * math.pi))
        else:
            out = np.where((v > self.a) & (v < self.b), -math.log(self.b - self.a), -np.inf)
        return np.where(np.isfinite(v), out, -np.inf)

    def describe(self) -> str:
        return f"{self.name} ~ {self.kind}({self.a:g}, {self.b:g})"

    def record(self) -> dict:
        return {"name": self.name, "kind": self.kind, "args": [self.a, self.b]}


def parse_prior(text: str) -> AddedPrior:
    """``NAME=normal:MEAN,SD`` or ``NAME=uniform:LO,HI`` (numbers read as literals, never evaluated)."""
    m = _PRIOR.fullmatch(str(text).replace(" ", ""))
    if not m:
        raise UserError(f"--prior {text!r}: expected NAME=normal:MEAN,SD or NAME=uniform:LO,HI with plain numbers, "
                        "e.g. H0=normal:67.0,1.0")
    name, kind, a, b = m.group(1), m.group(2), float(m.group(3)), float(m.group(4))
    if not (math.isfinite(a) and math.isfinite(b)):
        raise UserError(f"--prior {text!r}: the numbers must be finite")
    if kind == "normal" and not (b > 0 and math.isfinite(math.log(b * math.sqrt(2 * math.pi)))):
        raise UserError(f"--prior {text!r}: the standard deviation must be positive (with a finite density), "
                        f"got {b:g}")
    if kind == "uniform" and not (a < b and math.isfinite(b - a)):
        raise UserError(f"--prior {text!r}: a uniform range needs LO < HI (and a finite width), got [{a:g}, {b:g}]")
    return AddedPrior(name, kind, a, b)


@dataclass(frozen=True)
class Change:
    """What the reweighting changes: a target run file (``target``: its path) replacing the posterior or,
    with ``add``, adding its dataset's likelihood; and priors added on top."""
    target: str | None = None
    add: bool = False
    priors: tuple[AddedPrior, ...] = ()

    @property
    def kind(self) -> str:
        base = ("add-data" if self.add else "run-file") if self.target else "prior"
        return base + ("+prior" if self.target and self.priors else "")


# -- the parent's draws ------------------------------------------------------------------------------


@dataclass
class Draws:
    """The draws to reweight, flattened: (n, P) positions, (n, D) derived, (n,) ln p, ln L, ln w; origin (n, 3)."""
    names: tuple
    derived_names: tuple
    position: np.ndarray
    derived: np.ndarray
    log_post: np.ndarray
    log_like: np.ndarray
    log_weight: np.ndarray
    origin: np.ndarray
    tex: dict = field(default_factory=dict)
    bounds: dict = field(default_factory=dict)
    info: dict = field(default_factory=dict)       # kind, steps/draws, burn, thin, tau, rule


def sha256_of(path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def open_parent(chain):
    """(state, stored `Config`) of the chain file ``chain`` of either engine, read whole and checked."""
    from infer.config import stored
    from infer.store.chainfile import ChainStore
    from infer.store.enginefile import EngineFile, engine_of
    state = EngineFile(chain).read() if engine_of(chain) == "surrogate" else ChainStore(chain).read()
    return state, stored(state)


def space_of(state) -> tuple[tuple, dict]:
    """Sampled names and prior support of a chain state of either engine."""
    s = getattr(state, "samples", state)
    return tuple(s.names), dict(s.bounds)


def parent_draws(state, cfg, chain, burn: int | None = None, thin: int | None = None):
    """(draws, parent record) of a chain state: an ensemble chain's kept steps (`ensemble_draws`) or a
    surrogate engine's weighted exact sample, whole."""
    import h5py

    from infer.store.hdf5io import attr_str
    chain = str(Path(chain).resolve())
    if hasattr(state, "sample"):
        if burn is not None or thin is not None:
            raise UserError(f"{chain}: --burn and --thin apply to ensemble chains; a surrogate-engine sample is "
                            "reweighted whole")
        if state.sample is None:
            raise UserError(f"{chain}: the surrogate engine has not produced a weighted sample yet; resume it first")
        s, n = state.sample, len(state.sample["log_weight"])
        origin = np.stack([np.arange(n), np.full(n, -1), np.full(n, -1)], axis=1)
        draws = Draws(state.names, state.derived_names, s["position"], s["derived"], s["log_post"], s["log_like"],
                      s["log_weight"], origin, dict(state.tex), dict(state.bounds),
                      {"kind": "surrogate", "draws": n, "rule": "the surrogate engine's weighted exact sample, whole",
                       "converged": bool((state.report or {}).get("converged")),
                       "missing": [str(m) for m in (state.report or {}).get("missing", [])]})
    else:
        draws = ensemble_draws(state, cfg, chain, burn, thin)
    with h5py.File(chain, "r", locking=False) as f:
        created = attr_str(f, "created", "") or ""
    parent = {"path": chain, "sha256": sha256_of(chain), "created": created,
              "run_name": state.provenance.get("run_name"), **draws.info}
    return draws, parent


def ensemble_draws(state, cfg, chain, burn=None, thin=None) -> Draws:
    """The post-burn-in steps of an ensemble chain (`burnin.choose`, as the summary), every ``thin``-th
    (None: ⌈τ_max⌉), flattened over steps, ensembles and walkers."""
    s = state.samples
    if state.steps_done < 8:
        raise UserError(f"{chain}: only {state.steps_done} steps; nothing to reweight yet")
    if burn is not None and not 0 <= burn < state.steps_done:
        raise UserError(f"--burn must be between 0 and {state.steps_done - 1}, got {burn}")
    choice = burnin.choose(s, burn, tau_multiple=cfg.stopping.tau_multiple, source="set with --burn")
    kept = s.after(choice.burn)
    tau = choice.tau_max if math.isfinite(choice.tau_max) else burnin.tau_max(burnin.columns(kept))
    if thin is None:
        thin = max(1, int(math.ceil(tau))) if math.isfinite(tau) else 1
        if not math.isfinite(tau) or not burnin.tau_trusted(kept.steps, tau, cfg.stopping.tau_multiple):
            log.warning("%s: τ cannot be trusted yet on %d steps (the τ-multiple rule); the burn-in and the "
                        "thinning (every %d-th step) are provisional", chain, state.steps_done, thin)
    steps = np.arange(choice.burn, state.steps_done)[::thin]
    E, W, P = s.position.shape[1:]
    grid = np.stack(np.meshgrid(steps, np.arange(E), np.arange(W), indexing="ij"), axis=-1).reshape(-1, 3)
    take = lambda a: a[choice.burn::thin].reshape((len(grid),) + a.shape[3:])    # noqa: E731
    from infer.sampling.stopping import assess
    v = assess(s, cfg.stopping, burn=choice.burn)
    trusted = burnin.tau_trusted(v.step, v.tau_max, cfg.stopping.tau_multiple)
    info = {"kind": "ensemble", "steps": int(state.steps_done), "burn": int(choice.burn), "thin": int(thin),
            "tau_max": float(tau), "draws": int(len(grid)), "converged": bool(v.met),
            "missing": [str(m) for m in v.missing] if trusted else ["τ not yet measurable (run shorter than "
                                                                     "the τ-multiple rule)"],
            "rule": f"burn-in {choice.burn} steps ({choice.rule()}); every {thin}-th step after it"}
    return Draws(s.names, s.derived_names, take(s.position), take(s.derived), take(s.log_post), take(s.log_like),
                 np.zeros(len(grid)), grid, dict(s.tex), dict(s.bounds), info)


# -- the target ---------------------------------------------------------------------------------------


def check_space(target_cfg, names, bounds, parent_cfg, add: bool = False) -> np.ndarray:
    """The permutation taking the chain's parameter order to the target's; `UserError` (one line) when the
    target samples another parameter space (module docstring)."""
    where = target_cfg.path
    tnames = tuple(p.name for p in target_cfg.sampled)
    if set(tnames) != set(names):
        raise UserError(f"{where}: samples {', '.join(tnames)} but the chain sampled {', '.join(names)}; a "
                        "reweighting cannot change the parameter space")
    if target_cfg.fixed != parent_cfg.fixed:
        diff = sorted(set(target_cfg.fixed.items()) ^ set(parent_cfg.fixed.items()))
        shown = ", ".join(f"{k} = {v:g}" for k, v in diff)
        raise UserError(f"{where}: fixed parameters differ from the chain's ({shown}); a reweighting cannot change "
                        "the parameter space")
    from infer.parameters import support
    for p in target_cfg.sampled:
        lo, hi = support(p.prior)
        plo, phi = bounds[p.name]
        if lo < plo or hi > phi:
            raise UserError(f"{where}: 'parameters.{p.name}.prior' has support [{lo:g}, {hi:g}], beyond the "
                            f"chain's [{plo:g}, {phi:g}]: the chain has no draws there, and a reweighting "
                            "cannot change the parameter space")
        if add and (lo > plo or hi < phi):
            raise UserError(f"{where}: with --add the run file's 'parameters.{p.name}.prior' must cover the chain's "
                            f"support [{plo:g}, {phi:g}] (its priors are not used), got [{lo:g}, {hi:g}]")
    return np.array([names.index(n) for n in tnames], dtype=int)


def same_likelihood(target_cfg, parent_cfg, provenance) -> bool:
    """Whether the target's likelihood is the chain's: same dataset (selection and SHA-256 of its bytes),
    theory settings (run-control keys aside), likelihood options and fixed values."""
    from infer.model.posterior import load_data
    strip = lambda t: {k: v for k, v in t.items() if k != "delay_seconds"}       # noqa: E731
    if (target_cfg.dataset != parent_cfg.dataset or strip(target_cfg.theory) != strip(parent_cfg.theory)
            or target_cfg.sections != parent_cfg.sections or target_cfg.fixed != parent_cfg.fixed):
        return False
    return load_data(target_cfg).sha256 == provenance.get("dataset_sha256")


def evaluate_all(factory, points, workers: int = 0, threads: int = 0):
    """ln p, blobs, reasons and blob names of ``factory``'s log-density at ``points`` in one evaluator call
    (`infer.parallel.make_evaluator`); ``infer reweight`` uses its own batched, checkpointed loop instead."""
    from infer.parallel import cap_in_process_threads, make_evaluator
    cap_in_process_threads(workers, threads)
    with make_evaluator(factory, workers, threads) as ev:
        lp, blobs, reasons = ev.evaluate(points)
        return lp, blobs, list(reasons), tuple(ev.blob_names)


# -- the weights --------------------------------------------------------------------------------------


def new_log_weight(parent_log_weight, parent_log_post, target_log_post) -> np.ndarray:
    """ln w' = ln w + ln p_t − ln p_o; −∞ (zero weight) where any term is −∞ or not finite."""
    lw, lo, lt = (np.asarray(a, float) for a in (parent_log_weight, parent_log_post, target_log_post))
    ok = np.isfinite(lw) & np.isfinite(lo) & np.isfinite(lt)
    return np.where(ok, lw + np.where(ok, lt - lo, 0.0), -np.inf)


def judge(log_weight, min_ess: float = MIN_ESS, khat_max: float = KHAT_MAX) -> dict:
    """Kish ESS, PSIS k̂ (of the positive weights), the sample-size threshold, the largest normalised weight,
    and ``usable`` with ``why`` not (k̂ > ``khat_max`` or ESS < ``min_ess``)."""
    lw = np.asarray(log_weight, float)
    pos = np.isfinite(lw)
    out = {"draws": int(lw.size), "draws_used": int(pos.sum()), "min_ess": float(min_ess), "khat_max": float(khat_max)}
    if not pos.any():
        return {**out, "ess": 0.0, "khat": math.inf, "khat_threshold": math.nan, "max_weight": math.nan,
                "usable": False, "why": "every draw has zero weight under the target"}
    res = wts.psis(lw[pos])
    ess = wts.kish_ess(lw)
    out.update(ess=float(ess), khat=float(res.k_hat), khat_threshold=float(res.threshold),
               max_weight=float(wts.normalised_weights(lw).max()))
    why = []
    if not res.k_hat <= khat_max:
        why.append(f"Pareto k̂ {res.k_hat:.2f} > {khat_max:g} (the weights' variance is effectively infinite; "
                   "Vehtari et al. 2024)")
    if ess < min_ess:
        why.append(f"Kish ESS {ess:.0f} of {lw.size} draws < {min_ess:g}")
    return {**out, "usable": not why, "why": "; ".join(why)}


# -- the whole reweighting ------------------------------------------------------------------------------


def exact_terms(draws: Draws, add: bool, idx, lp, blobs, bnames):
    """ln p_t, ln L_t, derived values and names at every draw from the target's exact calls at the draws
    ``idx`` (the others get −∞): the target's own when it replaces the posterior; with ``add``, the chain's
    plus the added dataset's ln L (and χ²)."""
    from infer.model.posterior import CHI2
    n = len(draws.log_post)
    new_ll = np.full(n, -np.inf)
    new_ll[idx] = np.where(np.isfinite(lp), blobs[:, 0], -np.inf)
    if add:
        derived, dnames = draws.derived.copy(), draws.derived_names
        if CHI2 in dnames and CHI2 in bnames:
            chi2 = np.full(n, np.nan)
            chi2[idx] = blobs[:, bnames.index(CHI2)]
            derived[:, dnames.index(CHI2)] += chi2
        return draws.log_post + new_ll, draws.log_like + new_ll, derived, dnames
    lp_t = np.full(n, -np.inf)
    lp_t[idx] = lp
    dnames = tuple(bnames[1:])
    derived = np.full((n, len(dnames)), np.nan)
    derived[idx] = blobs[:, 1:]
    return lp_t, new_ll, derived, dnames


def reweight(chain, change: Change, check_out, *, calls=None, workers: int | None = None, burn: int | None = None,
             thin: int | None = None, min_ess: float = MIN_ESS):
    """Reweight the chain file ``chain`` by ``change`` (module docstring) into the file that
    ``check_out(target_cfg)`` checks and returns, before any theory call.

    ``calls(factory, points, key, workers, cfg)`` makes the exact calls (default `evaluate_all`; ``key``
    identifies the reweighting, for checkpoints). Returns the `infer.store.reweighted.Reweighted` written.
    `UserError` (one line, nothing written) for a bad target, a changed parameter space, an unknown prior
    name or unusable weights."""
    from infer import config
    from infer.store.reweighted import Reweighted, ReweightedFile
    target_cfg = config.load(change.target) if change.target else None
    if change.add and target_cfg is None:
        raise UserError("--add needs a run file whose dataset is added")
    if target_cfg is None and not change.priors:
        raise UserError("nothing to change: give a target run file, --prior NAME=normal:MEAN,SD, or both")
    out = check_out(target_cfg)
    state, parent_cfg = open_parent(chain)
    prov = state.provenance
    if target_cfg is not None:
        check_space(target_cfg, *space_of(state), parent_cfg, change.add)
    known = space_of(state)[0] + tuple(getattr(state, "samples", state).derived_names)
    for pr in change.priors:          # a target that recomputes the spectra may bring derived names of its own
        if pr.name not in known and (target_cfg is None or change.add):
            raise UserError(f"--prior {pr.name}: not a sampled or derived quantity of the chain (known: "
                            f"{', '.join(known)})")
    draws, parent = parent_draws(state, parent_cfg, chain, burn, thin)
    t0 = time.monotonic()
    n, ncalls, mode = len(draws.log_post), 0, "prior"
    usable = np.isfinite(draws.log_weight) & np.isfinite(draws.log_post)
    lp_t, ll_t, derived, dnames = draws.log_post.copy(), draws.log_like.copy(), draws.derived, draws.derived_names
    reasons: list = [None] * n
    changed = {"kind": change.kind, "add": change.add, "priors": [p.record() for p in change.priors],
               "prior_text": [p.describe() for p in change.priors],
               "target_path": target_cfg.path if target_cfg else None,
               "target_text": target_cfg.text if target_cfg else None}
    if target_cfg is not None:
        x_t = draws.position[:, check_space(target_cfg, draws.names, draws.bounds, parent_cfg, change.add)]
        if not change.add and same_likelihood(target_cfg, parent_cfg, prov):
            from infer.model.priors import PriorSet
            mode = "priors of the run file (stored likelihood)"
            lp_t = PriorSet(target_cfg.sampled, where=target_cfg.path).logpdf_many(x_t) + draws.log_like
        else:
            from infer.model.posterior import PosteriorFactory
            mode = "added dataset (exact calls)" if change.add else "target posterior (exact calls)"
            idx = np.flatnonzero(usable)
            w = target_cfg.sampling.workers if workers is None else workers
            key = {"parent_sha256": parent["sha256"], "change": {k: changed[k] for k in ("kind", "add", "target_text")},
                   "selection": {k: parent.get(k) for k in ("burn", "thin", "draws")}, "points": len(idx)}
            if calls is None:
                a, blobs, r, bnames = evaluate_all(PosteriorFactory(target_cfg), x_t[idx], w,
                                                   target_cfg.sampling.threads_per_worker)
            else:
                a, blobs, r, bnames = calls(PosteriorFactory(target_cfg), x_t[idx], key, w, target_cfg)
            ncalls = len(idx)
            for i, why in zip(idx, r):
                reasons[i] = why
            lp_t, ll_t, derived, dnames = exact_terms(draws, change.add, idx, a, np.asarray(blobs), tuple(bnames))
            failed = [x for x in r if x not in (None, "outside-prior")]
            if failed:
                log.warning("reweight: %d draws could not be computed by the target (%s); they get zero weight, "
                            "which biases the result unless the target truly excludes them", len(failed),
                            ", ".join(sorted(set(failed))))
    lp_t = np.where(usable, lp_t, -np.inf)
    for pr in change.priors:
        if pr.name not in draws.names + tuple(dnames):
            raise UserError(f"--prior {pr.name}: not a sampled or derived quantity of the target "
                            f"(known: {', '.join(draws.names + tuple(dnames))})")
        col = (draws.position[:, draws.names.index(pr.name)] if pr.name in draws.names
               else derived[:, dnames.index(pr.name)])
        lp_t = lp_t + pr.log_density(col)
    lw = new_log_weight(draws.log_weight, draws.log_post, lp_t)
    verdict = judge(lw, min_ess)
    if not verdict["usable"]:
        raise UserError(f"{chain}: the reweighted sample is unusable ({verdict['why']}); the target is too far "
                        "from the chain for importance reweighting: sample it directly. "
                        + ("No reweighted file was written; the exact calls stay in the checkpoint beside "
                           "--out, so a rerun makes no theory call" if ncalls and calls else "Nothing was written"))
    bounds, tex, provenance = dict(draws.bounds), dict(draws.tex), dict(prov)
    if target_cfg is not None:
        tex.update({p.name: p.tex for p in target_cfg.parameters})
        if not change.add:
            from infer.parameters import support
            bounds.update({p.name: tuple(support(p.prior)) for p in target_cfg.sampled})
            provenance.update(config_text=target_cfg.text, config_path=target_cfg.path, run_name=target_cfg.name,
                              dataset_file=target_cfg.dataset["file"])
            if ncalls:
                from infer.model.posterior import load_data
                data = load_data(target_cfg)
                provenance.update(dataset_sha256=data.sha256, experiment=data.experiment)
    report = {**verdict, "exact_calls": int(ncalls), "seconds": time.monotonic() - t0,
              "zero_weight": int(np.sum(~np.isfinite(lw)))}
    rw = Reweighted(tuple(draws.names), tuple(dnames), tex, bounds,
                    {"position": draws.position, "log_post": lp_t, "log_like": ll_t, "derived": derived,
                     "log_weight": lw, "log_post_parent": draws.log_post, "origin": draws.origin},
                    reasons, parent, {**changed, "mode": mode}, report, provenance)
    ReweightedFile(str(out)).write(rw)
    return rw
