"""The summary of a run: which files a paper needs, written safely, and the best-sample fit line.

`summarize_run` is what ``infer summarize`` (and ``run --summarize``) does: the one burn-in rule
(`infer.analysis.burnin.choose`), the stopping rule's verdict (`infer.sampling.stopping.assess`), the
marginal constraints (`infer.analysis.marginals.constraints`) judged against the run's own
``[stopping]`` targets, the fit quality of the best sample (the kept draw with the highest ln posterior,
`marginals.best_index`; χ², dof and PTE from the likelihood itself, `Posterior.fit_quality`), then the
files.

Files (`write_summary`): constraints.md, constraints.tex, triangle.png, traces.png, convergence.png and
bandpowers.png and residuals.png (per frequency pair) when the data-vs-model figures are asked for. An importance-weighted exact sample of the
surrogate engine (`write_weighted_summary`) gets the same tables and triangle plot computed with the
weights (`infer.analysis.weighted`), weights.png in place of the traces and convergence figures (which
do not apply to it), and bandpowers.png for its best exact draw. Each is written with
`infer.atomic.write_atomic` (temporary name, fsync, rename, folder fsync), so a kill leaves the old file
or the new one. A file is replaced only when a previous summary wrote it and it is unchanged since: a
hidden record (``.infer-summary-files.json``) of names and SHA-256 digests is kept in the folder, and
anything else under one of the names makes the call fail before any file is written.
"""
from __future__ import annotations

import hashlib
import json
import logging
import os
from dataclasses import replace
from pathlib import Path

import numpy as np

from infer.analysis import burnin
from infer.analysis.burnin import default_targets
from infer.analysis.marginals import best_index, constraints
from infer.analysis.samples import Samples
from infer.analysis.weighted import KHAT_MAX, WeightedSample, weighted_constraints
from infer import paths
from infer.atomic import write_atomic, write_text_atomic
from infer.errors import UserError
from infer.report.status import honest_missing
from infer.report.tables import latex_table, markdown_table

log = logging.getLogger("infer")

MANIFEST = ".infer-summary-files.json"
FILES = {"markdown": "constraints.md", "latex": "constraints.tex", "triangle": "triangle.png",
         "traces": "traces.png", "convergence": "convergence.png", "bandpowers": "bandpowers.png",
         "residuals": "residuals.png",
         "weights": "weights.png"}
#: The files of a chain's summary and of an importance-weighted sample's (bandpowers.png optional in both).
CHAIN_FILES = ("markdown", "latex", "triangle", "traces", "convergence", "bandpowers", "residuals")
WEIGHTED_FILES = ("markdown", "latex", "triangle", "weights", "bandpowers", "residuals")
#: Files written only with the data-vs-model figures (one theory call).
MODEL_FILES = ("bandpowers", "residuals")


# -- files ---------------------------------------------------------------------------------------------


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _load_manifest(outdir: Path) -> dict:
    p = outdir / MANIFEST
    if not p.exists():
        return {}
    try:
        data = json.loads(p.read_text(encoding="utf-8"))
        return {str(k): str(v) for k, v in data.get("files", {}).items()}
    except (OSError, ValueError, AttributeError):
        raise UserError(f"{p}: damaged record of files written by a previous summary; "
                        "remove it or choose another output directory") from None


def _check_target(path: Path, manifest: dict) -> None:
    """Refuse to replace anything that a previous summary did not write (or that was edited since)."""
    if not os.path.lexists(path):
        return
    if path.is_symlink() or not path.is_file() or manifest.get(path.name) != _sha256(path):
        raise UserError(f"{path}: exists and was not written by a previous summary (or was changed "
                        "since); move it away or choose another output directory")


def check_outputs(outdir, bandpowers: bool = True, files=CHAIN_FILES) -> tuple[Path, dict]:
    """Check, before any expensive step, that the summary can be written into ``outdir``.

    Creates the folder (with parents); refuses a path that is not a folder, a folder that is not
    writable, a damaged record, and any file under one of the summary's names (``files``, keys of
    `FILES`) that a previous summary did not write. Returns (resolved folder, record of files written so
    far).
    """
    outdir = Path(outdir).expanduser().resolve()
    if os.path.lexists(outdir) and not outdir.is_dir():
        raise UserError(f"{outdir}: output path exists and is not a directory")
    paths.file_folder(outdir / FILES["markdown"])       # creates the folder and checks it is writable
    manifest = _load_manifest(outdir)
    for key in files:
        if key not in MODEL_FILES or bandpowers:
            _check_target(outdir / FILES[key], manifest)
    return outdir, manifest


def _text(s: str):
    def fill(tmp):
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(s)
    return fill


def _write_all(outdir: Path, manifest: dict, fills: dict) -> dict[str, Path]:
    """Write each ``fills[key](tmp)`` atomically under `FILES` [key], recording its digest after each."""
    paths = {}
    for key, fill in fills.items():
        p = outdir / FILES[key]
        write_atomic(p, fill)
        manifest[p.name] = _sha256(p)
        write_text_atomic(outdir / MANIFEST, json.dumps({"files": manifest}, indent=1))
        paths[key] = p
    return paths


def _check_model(dataset, best_model):
    if (dataset is None) != (best_model is None):
        raise UserError("summary: the band-power figure needs both the data set and the best-sample model")
    if best_model is None:
        return None
    best_model = np.asarray(best_model, dtype=float)
    if best_model.shape != np.shape(dataset.value):
        raise UserError(f"summary: best-sample model has shape {best_model.shape}, the data set "
                        f"has {np.shape(dataset.value)} band powers")
    return best_model


def write_summary(samples: Samples, outdir, burn: int | burnin.BurnIn | None = None, dataset=None,
                  best_model=None, targets=None, *, burn_rule: str | None = None,
                  fit=None) -> dict[str, Path]:
    """Write the tables and figures of ``samples`` into ``outdir`` (module docstring).

    ``burn``: as `marginals.constraints` (None: the automatic rule). ``targets``: the run's
    `infer.config.Stopping` (None: its defaults). The band-power figure is drawn when ``dataset`` and
    ``best_model`` (the model band powers of the best sample) are given; ``fit`` is then the
    likelihood's `FitQuality` of that model, whose χ² the figure quotes. Returns {"markdown", "latex", "triangle", "traces", "convergence"[,
    "bandpowers"]: path}.
    """
    from infer.report import figures  # matplotlib only when figures are asked for

    targets = targets or default_targets()
    best_model = _check_model(dataset, best_model)
    outdir, manifest = check_outputs(outdir, bandpowers=dataset is not None)
    cons, info = constraints(samples, burn, targets=targets, burn_rule=burn_rule)
    kept = samples.after(info["burn"])
    md = markdown_table(cons, info, dict(samples.meta))
    tex = latex_table(cons, info)
    history = figures.convergence_history(samples, targets)
    fills = {
        "markdown": _text(md),
        "latex": _text(tex),
        "triangle": lambda tmp: figures.triangle(kept, list(samples.names), tmp,
                                                 best={c.name: c.best for c in cons}),
        "traces": lambda tmp: figures.traces(samples, tmp, info["burn"]),
        "convergence": lambda tmp: figures.convergence(history, tmp, targets),
    }
    if dataset is not None:
        fills["bandpowers"] = lambda tmp: figures.bandpowers(dataset, best_model, tmp, fit=fit)
        fills["residuals"] = lambda tmp: figures.residuals(dataset, best_model, tmp, fit=fit)
    return _write_all(outdir, manifest, fills)


def write_weighted_summary(ws: WeightedSample, result_info: dict | None, outdir, dataset=None, fit=None, *,
                           best_model=None, targets=None) -> dict[str, Path]:
    """Write the summary of an importance-weighted exact sample (the surrogate engine) into ``outdir``.

    ``ws``: the `WeightedSample`; ``result_info``: the run's `infer.analysis.weighted.engine_info` (how the
    sample was made: calls by stage, refinements, surrogate accuracy, surrogate chain, ln Z, verdict), or
    None when unknown (the tables then judge the weights alone and say so). ``targets``: the run's
    `infer.config.Stopping` (its ``ess_above`` is the weight-ESS target; None: ``result_info``'s
    ``ess_target``, else the default). The band-power figure is drawn when ``dataset`` and ``best_model``
    (the model band powers of the best exact draw, ``ws.position[ws.best_index()]``) are given, ``fit``
    being that model's `FitQuality`. Files: constraints.md, constraints.tex, triangle.png, weights.png
    [, bandpowers.png], with the same protection of the user's files as `write_summary`. Returns
    {"markdown", "latex", "triangle", "weights"[, "bandpowers"]: path}.
    """
    from infer.report import figures  # matplotlib only when figures are asked for

    if targets is None:
        targets = default_targets()
        if result_info and result_info.get("ess_target") is not None:
            targets = replace(targets, ess_above=float(result_info["ess_target"]))
    best_model = _check_model(dataset, best_model)
    outdir, manifest = check_outputs(outdir, bandpowers=dataset is not None, files=WEIGHTED_FILES)
    khat_max = float((result_info or {}).get("khat_max", KHAT_MAX))
    cons, info = weighted_constraints(ws, targets=targets, khat_max=khat_max)
    fills = {
        "markdown": _text(markdown_table(cons, info, dict(ws.meta), engine=result_info)),
        "latex": _text(latex_table(cons, info, engine=result_info)),
        "triangle": lambda tmp: figures.triangle(ws, list(ws.names), tmp, best={c.name: c.best for c in cons}),
        "weights": lambda tmp: figures.weights(ws, tmp, result_info),
    }
    if dataset is not None:
        fills["bandpowers"] = lambda tmp: figures.bandpowers(dataset, best_model, tmp, fit=fit)
        fills["residuals"] = lambda tmp: figures.residuals(dataset, best_model, tmp, fit=fit)
    return _write_all(outdir, manifest, fills)


# -- the command ---------------------------------------------------------------------------------------


def summarize_run(state, cfg, chain, out=None, burn: int | None = None, no_model: bool = False) -> str:
    """Summarise the run of chain state ``state`` (its stored `Config` ``cfg``); returns the report text.

    The output folder is checked before the theory is called; ``burn`` None chooses it automatically.
    """
    from infer.sampling.stopping import assess
    s = state.samples
    if state.steps_done < 8:
        raise UserError(f"{chain}: only {state.steps_done} steps; nothing to summarise yet")
    if burn is not None and not 0 <= burn < state.steps_done:
        raise UserError(f"--burn must be between 0 and {state.steps_done - 1}, got {burn}")
    outdir, _ = check_outputs(Path(out).resolve() if out else Path(cfg.summary_dir), bandpowers=not no_model)
    choice = burnin.choose(s, burn, tau_multiple=cfg.stopping.tau_multiple, source="set with --burn")
    v = assess(s, cfg.stopping, burn=choice.burn)
    missing = honest_missing(v.missing, burnin.tau_trusted(v.step, v.tau_max, cfg.stopping.tau_multiple))
    s.meta.update({"run": state.provenance.get("run_name"), "experiment": state.provenance.get("experiment"),
                   "converged": v.met, "stop_rule": vars(cfg.stopping), "missing": missing,
                   "rejections": state.rejections,
                   "calls": state.steps_done * s.position.shape[1] * s.position.shape[2],
                   "best_fit": best_fit_line(cfg, chain)})
    dataset = model = fit = None
    if not no_model:
        try:
            from infer.model.posterior import Posterior
            post = Posterior(cfg)
            model, fit = post.fit_quality(s.position[best_index(s, choice.burn)])
            dataset = post.data
            s.meta.update({"chi2_best": fit.chi2, "n_bins": fit.n_bins, "dof": fit.dof, "pte_best": fit.pte})
            s.meta.update(fit_meta(post, fit, kept_positions(s, choice.burn),
                                   best=s.position[best_index(s, choice.burn)]))
        except UserError as err:
            log.warning("no data-vs-model figure: %s", err)
    paths = write_summary(s, outdir, choice, dataset=dataset, best_model=model, targets=cfg.stopping,
                          fit=fit)
    verdict = "met every stopping target" if v.met else "NOT converged: " + "; ".join(missing)
    lines = [f"summary of {chain} ({state.steps_done} steps, {choice.burn} discarded as burn-in): {verdict}"]
    if "chi2_best" in s.meta:
        lines.append(f"best sample: χ² = {s.meta['chi2_best']:.1f} for {s.meta['n_bins']} bands "
                     f"({s.meta['dof']} dof after {len(s.names)} parameters), PTE = {s.meta['pte_best']:.3f}")
    lines += [f"  {kind:<12} {path}" for kind, path in paths.items()]
    return "\n".join(lines)


def summarize_engine_run(state, cfg, chain, out=None, no_model: bool = False) -> str:
    """Summarise a surrogate-engine chain (`infer.store.enginefile.EngineState`) with its weights; returns
    the report text. The output folder is checked before the theory is called."""
    from infer.analysis.weighted import WeightedSample
    from infer.report.status import engine_record
    if state.sample is None:
        raise UserError(f"{chain}: the surrogate engine has not produced a weighted sample yet "
                        f"({state.calls_done} exact calls so far); resume it with `infer resume {chain}`")
    outdir, _ = check_outputs(Path(out).resolve() if out else Path(cfg.summary_dir), bandpowers=not no_model,
                              files=WEIGHTED_FILES)
    s = state.sample
    meta = {"run": state.provenance.get("run_name"), "experiment": state.provenance.get("experiment"),
            "stop_reason": state.stop_reason, "best_fit": best_fit_line(cfg, chain)}
    ws = WeightedSample(state.names, state.derived_names, s["position"], s["derived"], s["log_post"],
                        s["log_like"], s["log_weight"], dict(state.tex), dict(state.bounds), meta)
    info = engine_record(state, cfg)
    dataset = model = fit = None
    if not no_model:
        try:
            from infer.model.posterior import Posterior
            post = Posterior(cfg)
            model, fit = post.fit_quality(ws.position[ws.best_index()])
            dataset = post.data
            ws.meta.update(fit_meta(post, fit, ws.position, np.exp(ws.log_weight - np.max(ws.log_weight)),
                                    best=ws.position[ws.best_index()]))
        except UserError as err:
            log.warning("no data-vs-model figure: %s", err)
    paths = write_weighted_summary(ws, info, outdir, dataset=dataset, fit=fit, best_model=model,
                                   targets=cfg.stopping)
    verdict = ("met every target" if info["converged"] else "NOT converged: " + "; ".join(info["missing"]))
    lines = [f"summary of {chain} (surrogate engine: {info['exact_calls']} exact calls, weight ESS "
             f"{info['ess']:.0f}, k̂ {info['khat']:.2f}): {verdict}"]
    if fit is not None:
        lines.append(f"best exact draw: χ² = {fit.chi2:.1f} for {fit.n_bins} bands ({fit.dof} dof after "
                     f"{len(ws.names)} parameters), PTE = {fit.pte:.3f}")
    lines += [f"  {kind:<12} {path}" for kind, path in paths.items()]
    return "\n".join(lines)


#: Posterior-predictive draws made by the summary when the theory is the (free) template model; a
#: Boltzmann theory costs one call per draw, so the summary skips the check there (call
#: `infer.analysis.ppc` with `Posterior.model_bands` to run it).
PPC_DRAWS = 200


def kept_positions(s, burn: int) -> np.ndarray:
    """The kept draws of a chain, (draws, parameters)."""
    pos = s.position[burn:]
    return pos.reshape(-1, pos.shape[-1])


def fit_meta(post, fit, positions, weights=None, draws: int | None = None, best=None) -> dict:
    """Summary lines of the fit per (kind, pair) block, the conditional best fit of the analytically
    marginalised parameters at ``best`` (`infer.model.marginal`), and, for a cheap theory, the
    posterior-predictive p-value (`infer.analysis.ppc`) from ``draws`` posterior draws (default
    `PPC_DRAWS` for the template theory, none otherwise)."""
    from infer.analysis.ppc import predictive_check, select_draws
    from infer.model.fitquality import pte
    meta = {"fit_blocks": [f"{lab} {c2:.1f}/{n} (PTE {pte(c2, n):.3f})" for lab, (c2, n) in
                           (getattr(fit, "by_pair", None) or fit.by_kind).items()]}
    if best is not None and post.analytic_names:
        from infer.report.rounding import format_value
        cond = post.analytic_fit(np.asarray(best, float))
        meta["analytic"] = "; ".join(f"`{n}` {format_value(a, sd, tex=False)}" for n, (a, sd) in cond.items())
    if draws is None:
        draws = PPC_DRAWS if post.cfg.theory.get("code") == "templates" else 0
    if draws > 0:
        idx = select_draws(len(positions), draws, weights, rng=0)
        models = np.array([post.model_bands(positions[i]) for i in idx])
        res = predictive_check(post.data.value, post.data.covariance, models, rng=1)
        meta["ppc"] = (f"p = {res.p_value:.3f} ± {res.error:.3f} (P(χ²_rep ≥ χ²_obs), {res.draws} posterior "
                       "draws, one replicate each)")
    return meta


def best_fit_line(cfg, chain) -> str | None:
    """One line describing the run's `infer fit` result file beside the chain, if there is one (read as
    JSON data; a file that is not a fit result is ignored with a warning)."""
    from infer.fit.bestfit import FORMAT as FIT_FORMAT, default_path
    path = default_path(replace(cfg, chain_path=str(Path(chain).resolve())), "posterior")
    if not path.is_file():
        return None
    try:
        rec = json.loads(path.read_text(encoding="utf-8"))
        if rec.get("format") != FIT_FORMAT:
            raise ValueError("not a fit result")
        best = ", ".join(f"{k} = {v:.6g}" for k, v in rec["best"].items())
        return (f"χ² = {rec['chi2']:.1f} for {rec['n_bands']} bands ({rec['dof']} dof, PTE = {rec['pte']:.3f}) "
                f"at {best} ({rec['calls']} exact calls; {path.name})")
    except (OSError, ValueError, KeyError, TypeError) as err:
        log.warning("%s: not read as a best-fit record (%s)", path, err)
        return None


def summarize_reweighted_run(state, cfg, chain, out=None, no_model: bool = False) -> str:
    """Summarise a reweighted chain (`infer.store.reweighted.Reweighted`, from ``infer reweight``) with its
    weights; returns the report text. The default output folder is beside the file (never the parent's)."""
    outdir, _ = check_outputs(Path(out).resolve() if out else Path(str(Path(chain).resolve())[:-3]),
                              bandpowers=not no_model, files=WEIGHTED_FILES)
    ws = state.weighted_sample({"run": state.provenance.get("run_name"),
                                "experiment": state.provenance.get("experiment")})
    rep, parent = state.report, state.parent
    info = {"reweighted": True, "parent": parent, "change": state.change, "exact_calls": rep["exact_calls"],
            "khat_max": rep["khat_max"], "converged": bool(parent.get("converged")),
            "missing": [f"parent chain: {m}" for m in parent.get("missing", [])]}
    dataset = model = fit = None
    if not no_model:
        try:
            from infer.model.posterior import Posterior
            post = Posterior(cfg)
            model, fit = post.fit_quality(ws.position[ws.best_index()])
            dataset = post.data
            ws.meta.update(fit_meta(post, fit, ws.position, np.exp(ws.log_weight - np.max(ws.log_weight))))
        except UserError as err:
            log.warning("no data-vs-model figure: %s", err)
    paths = write_weighted_summary(ws, info, outdir, dataset=dataset, fit=fit, best_model=model,
                                   targets=cfg.stopping)
    lines = [f"summary of {chain} (reweighted from {parent['path']}: weight ESS {rep['ess']:.0f} of "
             f"{rep['draws']} draws, k̂ {rep['khat']:.2f})"]
    lines += [f"  {kind:<12} {path}" for kind, path in paths.items()]
    return "\n".join(lines)


def summarize_file(chain: str, out=None, burn: int | None = None, no_model: bool = False) -> str:
    """``infer summarize``: the summary of the chain file ``chain``, of either engine, or of a reweighted
    chain; returns the text."""
    from infer.config import stored as stored_config
    from infer.store.chainfile import ChainStore
    from infer.store.enginefile import EngineFile, engine_of
    from infer.store.reweighted import ReweightedFile, is_reweighted
    if is_reweighted(chain):
        if burn is not None:
            raise UserError("--burn applies to ensemble chains; a reweighted sample was cut when it was made "
                            "(`infer reweight --burn`)")
        state = ReweightedFile(chain).read()
        return summarize_reweighted_run(state, stored_config(state), chain, out, no_model)
    if engine_of(chain) == "surrogate":
        if burn is not None:
            raise UserError("--burn applies to ensemble chains; a surrogate-engine sample has no burn-in")
        state = EngineFile(chain).read()
        return summarize_engine_run(state, stored_config(state), chain, out, no_model)
    state = ChainStore(chain).read()
    return summarize_run(state, stored_config(state), chain, out, burn, no_model)
