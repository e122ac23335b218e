"""The constraints tables: a Markdown report and a LaTeX ``tabular`` ready for ``\\input``.

Both take the `infer.analysis.marginals.Constraint` rows and the ``info`` of `marginals.constraints`, so
they state the burn-in rule used, the run's own convergence targets and the best sample as the
analysis defined them. Wording, column headings and markers are ours. A quantity whose τ fails the
τ-multiple rule (`infer.analysis.burnin.tau_trusted`) shows no τ and no ESS, only the word "unreliable"
and a note saying why: on a run shorter than that rule the estimates are biased (τ low, ESS high) and
would be quoted as if they meant something. Numbers are rounded by `infer.report.rounding`.

An importance-weighted exact sample (the surrogate engine; ``info`` of
`infer.analysis.weighted.weighted_constraints`, ``info["weighted"]``) shares the rows' first six cells,
the LaTeX rows and the notes, but has its own preamble (how the sample was made: exact calls by stage,
refinements, held-out surrogate accuracy, the proposal chain's R̂ and ESS, Kish weight ESS, Pareto k̂
with the k̂ < 0.7 rule of Vehtari et al. 2024, ln Z, the verdict) and, in place of R̂/ESS/τ, each
quantity's Monte Carlo errors and effective draws for its mean. R̂ appears only as the proposal
chain's, a property of the proposal, never as a claim about the weighted estimates.
"""
from __future__ import annotations

import math

import numpy as np

from infer.analysis.marginals import ASYMMETRY_THRESHOLD, EDGE_PEAK_RATIO, EDGE_STRIP, Constraint
from infer.report.rounding import format_asym, format_interval, format_number, format_value, scale

#: Marker on rows that miss a convergence target.
FLAG = "‡"
#: Marker on τ/ESS cells that the τ-multiple rule does not support.
UNRELIABLE = "unreliable ¶"

MARKDOWN_HEADINGS = ("Quantity", "Mean ± sd", "Median", "Central 68 %", "Central 95 % (or bound)",
                     "Best sample", "R̂", "Effective draws, bulk / tail", "τ (steps)")
LATEX_HEADINGS = ("Quantity", r"Estimate, 68\,\% credible", r"95\,\% credible range or bound")


def _targets(info: dict) -> tuple[float, float, float]:
    return float(info["rhat_target"]), float(info["ess_target"]), float(info["tau_multiple"])


def _verdict(cons: list[Constraint], info: dict) -> str:
    rt, et, m = _targets(info)
    judged = [c for c in cons if c.sd != 0]
    rhats = [c.rhat for c in judged if np.isfinite(c.rhat)]
    esss = [min(c.ess_bulk, c.ess_tail) for c in judged
            if c.trusted and np.isfinite(min(c.ess_bulk, c.ess_tail))]
    untrusted = [c.name for c in judged if not c.trusted]
    rmax = max(rhats, default=float("nan"))
    parts = [f"largest R̂ = {rmax:.4f} (target ≤ {rt:g})"]
    if untrusted:
        parts.append(f"effective draws and τ not yet measurable for {len(untrusted)} of {len(judged)} "
                     f"quantities (run of {info['steps']} steps shorter than {m:g} τ)")
    if esss:
        parts.append(f"smallest trusted bulk/tail ESS = {min(esss):.0f} (target ≥ {et:g})")
    head = "over all sampled and derived quantities, " + "; ".join(parts)
    bad = [c.name for c in judged if c.flagged(rt, et)]
    if not bad:
        return f"**Converged**: {head}."
    return (f"**Not converged**: {head}; {len(bad)} quantit{'y misses' if len(bad) == 1 else 'ies miss'} "
            f"a target ({', '.join(bad)}, marked {FLAG}). Run longer before quoting these numbers.")


def _meta_lines(meta: dict) -> list[str]:
    """Preamble lines from the run's metadata (any subset of the keys below may be present)."""
    out = []
    for key, label in (("run", "Run"), ("run_name", "Run"), ("experiment", "Experiment"),
                       ("dataset", "Data set"), ("theory", "Theory"), ("stop_reason", "Stopped because")):
        if key == "run_name" and meta.get("run") not in (None, ""):
            continue
        if meta.get(key) not in (None, ""):
            out.append(f"- {label}: {meta[key]}")
    if meta.get("best_fit"):
        out.append(f"- Best fit (`infer fit`, an optimised maximum): {meta['best_fit']}")
    if meta.get("chi2_best") is not None:
        line = f"- Fit of the best sample: χ² = {float(meta['chi2_best']):.1f}"
        if meta.get("n_bins") is not None:
            line += f" for {meta['n_bins']} band powers"
        if meta.get("dof") is not None:
            line += f" ({meta['dof']} degrees of freedom"
            line += f", PTE = {float(meta['pte_best']):.3f})" if meta.get("pte_best") is not None else ")"
        out.append(line + ".")
    elif meta.get("n_bins") is not None:
        out.append(f"- Band powers: {meta['n_bins']}")
    if meta.get("fit_blocks"):
        out.append("- χ² per spectrum and pair (own covariance block; PTE for the block's band count, "
                   "indicative: blocks share the parameters): " + "; ".join(meta["fit_blocks"]) + ".")
    if meta.get("analytic"):
        out.append("- Marginalised analytically (Bridle et al. 2002, MNRAS 335, 1193; not sampled): conditional "
                   "best fit ± conditional sd at the best draw, the other parameters held there: "
                   f"{meta['analytic']}.")
    if meta.get("ppc"):
        out.append(f"- Posterior-predictive check (Gelman, Meng & Stern 1996): {meta['ppc']}.")
    if meta.get("converged") is not None:
        missing = meta.get("missing") or []
        out.append("- Stopping rule of the run: " + ("met." if meta["converged"] else
                   "not met (" + "; ".join(str(m) for m in missing) + ")."))
    rej = meta.get("rejections")
    if isinstance(rej, dict) and any(rej.values()):
        out.append("- Points the theory could not compute (log-posterior −∞): "
                   + ", ".join(f"{k}: {v}" for k, v in rej.items() if v) + ".")
    if meta.get("calls") is not None:
        out.append(f"- Posterior evaluations: {int(meta['calls']):,}.")
    return out


def _ess_cell(c: Constraint) -> str:
    if not c.trusted:
        return UNRELIABLE
    f = lambda v: f"{v:.0f}" if np.isfinite(v) else "—"
    return f"{f(c.ess_bulk)} / {f(c.ess_tail)}"


def _tau_cell(c: Constraint) -> str:
    if not c.trusted:
        return UNRELIABLE if c.sd != 0 else "—"
    return f"{c.tau:.1f}" if np.isfinite(c.tau) else "—"


def markdown_table(cons: list[Constraint], info: dict, meta: dict | None = None, engine: dict | None = None
                   ) -> str:
    """A Markdown report: what was summarised, the convergence verdict, then one row per quantity.

    ``info`` from `marginals.constraints` (a chain) or `infer.analysis.weighted.weighted_constraints` (an
    importance-weighted sample; then ``engine``, the `weighted.engine_info` of the run, says how the sample
    was made and the preamble and columns are those of `weighted_markdown_table`).
    """
    if info.get("weighted"):
        return weighted_markdown_table(cons, info, meta, engine)
    meta = meta or {}
    rt, et, m = _targets(info)
    lines = ["# Marginal constraints", ""]
    lines += _meta_lines(meta)
    best = info["best"]
    lines += [
        f"- Chain: {info['ensembles']} ensemble(s) × {info['walkers']} walkers × {info['steps']} steps.",
        f"- Burn-in discarded: the first {info['burn']} steps ({info['burn_rule']}); "
        f"{info['steps_kept']:,} steps kept, {info['draws']:,} draws pooled over all walkers and ensembles.",
        "- Central intervals: 68 % from the 16th to the 84th percentile, 95 % from the 2.5th to "
        "the 97.5th percentile of the pooled draws (equal probability in each tail).",
        f"- Best sample: the kept draw with the highest log-posterior (step {best['step']}, ensemble "
        f"{best['ensemble']}, walker {best['walker']}; ln P = {best['log_post']:.3f}, "
        f"−2 ln L = {-2 * best['log_like']:.2f}); not an optimised maximum.",
        f"- {_verdict(cons, info)}",
    ]
    if info["ensembles"] == 1:
        lines.append("- With a single ensemble R̂ only compares the two halves of the run; independent "
                     "ensembles are needed for a between-chain test.")
    if info.get("nonfinite"):
        lines.append("- Non-finite values were left out: " + ", ".join(
            f"`{k}` {v} draw(s)" for k, v in info["nonfinite"].items()) + ".")
    lines += ["", "| " + " | ".join(MARKDOWN_HEADINGS) + " |", "|" + "---|" * len(MARKDOWN_HEADINGS)]
    any_flag = any_untrusted = False
    for c in cons:
        flag = c.flagged(rt, et)
        any_flag |= flag
        any_untrusted |= (not c.trusted and c.sd != 0)
        rhat = f"{c.rhat:.4f}" if np.isfinite(c.rhat) else "—"
        lines.append("| " + " | ".join(_row_cells(c, flag) + [rhat, _ess_cell(c), _tau_cell(c)]) + " |")
    any_limit = any(c.limit is not None for c in cons)
    notes = []
    if any_flag:
        notes.append(f"{FLAG} R̂ > {rt:g}, bulk/tail ESS < {et:g} (the run's targets; Vehtari et al. 2021, "
                     "Bayesian Analysis 16, 667), τ not yet measurable, or the diagnostics are undefined "
                     "(non-finite values): this row is not yet reliable.")
    if any_untrusted:
        notes.append(f"¶ The run ({info['steps']} steps) is shorter than {m:g} × this quantity's provisional "
                     "autocorrelation time, so neither τ nor the effective number of draws can be measured "
                     "yet: on short runs the estimator gives τ far too low and ESS far too high "
                     "(the τ-multiple rule of Foreman-Mackey et al. 2013, PASP 125, 306). Run longer.")
    notes += _shared_notes(any_limit, info)
    lines += [""] + notes
    return "\n".join(lines) + "\n"


def _row_cells(c: Constraint, flag: bool) -> list[str]:
    """The cells every Markdown table shares: quantity, mean ± sd, median, 68 %, 95 % or bound, best."""
    s = scale(c)
    name = f"`{c.name}` ${c.tex}$" + (f" {FLAG}" if flag else "")
    if not c.sampled:
        name += " (derived)"
    if c.limit is not None:
        kind, v = c.limit
        sign = "<" if kind == "upper" else ">"
        ci95 = f"{sign} {format_number(v, s)} (one-sided 95 %) §"
    else:
        ci95 = format_interval(c.lo95, c.hi95, s)
    return [name, format_value(c.mean, c.sd, tex=False), format_number(c.median, s),
            format_interval(c.lo68, c.hi68, s), ci95, format_number(c.best, s)]


def _shared_notes(any_limit: bool, info: dict) -> list[str]:
    notes = []
    if any_limit:
        notes.append(
            "§ The marginal piles up on an edge of the prior: the density within h of the edge is at least "
            f"{EDGE_PEAK_RATIO:g} × its peak density, with h = min({100 * EDGE_STRIP:g} % of the prior range, "
            "a quarter of the 68 % width). A one-sided 95 % bound (95th or 5th percentile) is quoted.")
    if info.get("prior_dominated"):
        notes.append("The marginal of " + ", ".join(f"`{n}`" for n in info["prior_dominated"])
                     + " fills its whole prior range: the data do not constrain it.")
    notes.append("Numbers are rounded to two significant digits of their uncertainty (the smaller half of "
                 "the 68 % interval for medians and intervals, sd for the mean).")
    return notes


def _ascii(s: str) -> str:
    """Plain ASCII for LaTeX comments (a table must compile without input-encoding packages)."""
    for a, b in (("×", "x"), ("τ", "tau"), ("R̂", "R-hat"), ("≤", "<="), ("≥", ">="), ("−", "-"), ("σ", "sigma"),
                 ("k̂", "k-hat"), ("Δ", "Delta"), ("₁₀", "10"), ("±", "+/-"), ("—", "-"), ("–", "-"),
                 ("**", "")):
        s = s.replace(a, b)
    return s.encode("ascii", "replace").decode("ascii")


def _tex_escape(s: str) -> str:
    return s.replace("\\", r"\textbackslash{}").replace("_", r"\_").replace("%", r"\%").replace("&", r"\&")


def latex_table(cons: list[Constraint], info: dict, engine: dict | None = None) -> str:
    """A plain ``tabular`` (no packages) of the marginal constraints, ready for ``\\input``.

    Estimate column: ``mean \\pm sd`` for near-symmetric marginals and ``median^{+a}_{-b}`` (68 %
    central interval) when |a − b| > 20 % of (a + b)/2 (`ASYMMETRY_THRESHOLD`); a dash when the
    marginal piles up on a prior edge. Second column: the central 95 % interval, or a one-sided 95 %
    bound ``< v`` / ``> v`` at a prior edge. A weighted ``info`` (with the run's ``engine`` record) gets
    the comment block of an importance-weighted sample instead of the chain's; rows and columns are the
    same.
    """
    if info.get("weighted"):
        et = float(info["ess_target"])
        head = ["% Marginal constraints written by infer from an importance-weighted exact sample "
                "(weighted central intervals)."]
        return _latex(cons, head + ["% " + _ascii(line) for line in _weighted_preamble(info, engine, latex=True)],
                      lambda c: c.flagged(math.nan, et),
                      f"% dagger: fewer effective draws for the mean than the target {et:g}, so the Monte "
                      "Carlo error is larger than the run aimed for.")
    rt, et, m = _targets(info)
    untrusted = info.get("untrusted") or []
    out = [
        "% Marginal constraints written by infer (central intervals of the pooled draws).",
        f"% Burn-in: first {info['burn']} of {info['steps']} steps discarded ({_ascii(info['burn_rule'])}).",
        f"% Draws: {info['draws']} from {info['ensembles']} ensemble(s) x {info['walkers']} walkers.",
        f"% Convergence: {'all' if info.get('converged') else 'NOT all'} quantities have "
        f"R-hat <= {rt:g}, bulk/tail ESS >= {et:g} and a run longer than {m:g} tau.",
    ]
    if untrusted:
        out.append(f"% tau and ESS NOT YET MEASURABLE (run shorter than {m:g} tau) for: "
                   + _ascii(", ".join(untrusted)) + ".")
    return _latex(cons, out, lambda c: c.flagged(rt, et),
                  f"% dagger: R-hat > {rt:g}, ESS < {et:g} or tau not yet measurable; not yet reliable.")


def _latex(cons: list[Constraint], comments: list[str], flagged, flag_note: str) -> str:
    """The ``tabular`` that both kinds of sample share, after their own comment lines."""
    out = list(comments) + [
        "% Estimate column: mean \\pm sd, or median^{+a}_{-b} when |a-b| > "
        f"{100 * ASYMMETRY_THRESHOLD:g}% of (a+b)/2; bounds are one-sided 95%.",
        r"\begin{tabular}{lcc}",
        r"\hline",
        " & ".join(LATEX_HEADINGS) + r" \\",
        r"\hline",
    ]
    for c in cons:
        label = f"${c.tex}$" if c.tex else _tex_escape(c.name)
        s = scale(c)
        if c.limit is not None:
            kind, v = c.limit
            sign = "<" if kind == "upper" else ">"
            col68 = "---"
            col95 = f"${sign} {format_number(v, s, tex=True)}$ (95\\,\\%)"
        else:
            if c.asymmetric:
                col68 = f"${format_asym(c.median, c.hi68 - c.median, c.median - c.lo68)}$"
            else:
                col68 = f"${format_value(c.mean, c.sd)}$"
            col95 = "$" + format_interval(c.lo95, c.hi95, s, tex=True) + "$"
        if flagged(c):
            label = f"${c.tex}{{}}^\\dagger$" if c.tex else label + r"$^\dagger$"
        out.append(f"{label} & {col68} & {col95} \\\\")
    out += [r"\hline", r"\end{tabular}"]
    if any(flagged(c) for c in cons):
        out.append(flag_note)
    return "\n".join(out) + "\n"


# -- importance-weighted samples (the surrogate engine) ------------------------------------------------


def _sig2(v: float) -> str:
    """A Monte Carlo error to two significant digits of itself."""
    return format_number(v, v) if np.isfinite(v) and v > 0 else ("0" if v == 0 else "—")


def _num(v, fmt: str) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return "—"
    return format(v, fmt) if math.isfinite(v) else "—"


def _weighted_verdict(info: dict, engine: dict | None) -> tuple[bool, list[str]]:
    """(met, what is missing). The weights' part of the stopping rule (weight ESS ≥ target, k̂ below
    ``khat_max``) is checked here on the weights themselves; with the engine's record its own verdict
    (surrogate chain converged) must hold too. A record that calls the run converged while the weights
    fail is not believed."""
    missing = [str(m) for m in (engine or {}).get("missing") or []]
    if info["ess"] < info["ess_target"] and not any(m.startswith("weight ESS") for m in missing):
        missing.append(f"weight ESS {info['ess']:.0f} < {info['ess_target']:g}")
    if not info["khat"] < info["khat_max"] and not any(m.startswith("k̂") for m in missing):
        missing.append(f"k̂ {info['khat']:.2f} ≥ {info['khat_max']:g}")
    if engine is not None and not engine.get("converged") and not missing:
        missing.append("the run stopped before its stopping rule was met")
    return not missing, missing


def _weighted_preamble(info: dict, engine: dict | None, latex: bool = False) -> list[str]:
    """Sentences saying how the weighted sample was made and what its diagnostics are (Markdown or, for
    ``latex``, the same sentences for comment lines)."""
    if engine is not None and engine.get("reweighted"):
        return _reweighted_preamble(info, engine, latex)
    lines = [f"Sample: {info['draws_used']:,} exact posterior evaluations at draws of a proposal, each "
             "weighted by its importance weight (exact posterior over proposal density) so that every "
             "number below is an estimate under the exact posterior (the surrogate engine)."
             + (f" {info['draws'] - info['draws_used']:,} further draws fell outside the prior or could not be computed (zero weight)."
                if info["draws"] > info["draws_used"] else "")]
    if engine is not None:
        by = engine.get("calls_by_stage") or {}
        calls = int(engine.get("exact_calls", 0))
        line = (f"Exact calls of the run: {calls:,} in all — {by.get('fit', 0):,} for the best fit, "
                f"{by.get('design', 0):,} at the surrogate's design points, {by.get('correct', 0):,} at the "
                "correction draws summarised here")
        if engine.get("theory_calls") is not None and int(engine["theory_calls"]) != calls:
            line += f" ({int(engine['theory_calls']):,} reached the theory code; the rest lay outside the prior)"
        ess = float(engine.get("ess", info["ess"]))
        if ess > 0:
            line += f"; {calls / ess:.2f} exact calls per effective sample"
        lines.append(line + ".")
        rounds = engine.get("rounds") or []
        line = ("Proposal: a defensive mixture of the surrogate posterior (its chain thinned by the "
                "autocorrelation time) and a heavy-tailed Student-t around the Laplace approximation "
                f"(Hesterberg 1995, Technometrics 37, 185); surrogate refined {int(engine.get('refits', 0))} "
                f"time(s), {len(rounds)} correction round(s) in all, combined by deterministic-mixture weights "
                "(Owen & Zhou 2000, JASA 95, 135)")
        if rounds:
            r = rounds[-1]
            line += (f"; accuracy in the last round, exact minus surrogate ln posterior at its {r['n']} exact "
                     "points, none of which trained the surrogate that proposed them: RMS "
                     f"|Δ ln p| = {_num(r['heldout_rms'], '.3g')}, worst {_num(r['heldout_worst'], '.3g')}")
        lines.append(line + ".")
        ch = engine.get("chain") or {}
        if ch:
            state = "met its stopping rule" if ch.get("met") else "did NOT meet its stopping rule"
            lines.append(f"Proposal chain (MCMC on the surrogate posterior, not on the exact one): largest R̂ = "
                         f"{_num(ch.get('rhat_max'), '.4f')}, smallest ESS = {_num(ch.get('ess_min'), '.0f')} "
                         f"after {_num(ch.get('steps'), '.0f')} steps; it {state}. These qualify the proposal "
                         "only: the weights correct what it misses, and k̂ says whether they can.")
    return lines + _weights_and_verdict(info, engine, latex)


def _reweighted_preamble(info: dict, engine: dict, latex: bool = False) -> list[str]:
    """How a reweighted chain (``infer reweight``) was made, then the same weight and verdict sentences."""
    parent, change = engine["parent"], engine["change"]
    what = "; ".join(filter(None, [change.get("target_path") and (
        ("the likelihood of the dataset of " if change["kind"].startswith("add") else "the posterior of ")
        + change["target_path"]), *change.get("prior_text", [])]))
    lines = [f"Sample: {info['draws_used']:,} draws of the chain {parent['path']} (run {parent.get('run_name')}; "
             f"{parent['rule']}), importance-reweighted to {what}: each weight is the chain's weight times "
             "p_target/p_chain at the draw, so every number below is an estimate under the changed posterior "
             f"({int(engine.get('exact_calls', 0)):,} exact calls of the target)."
             + (f" {info['draws'] - info['draws_used']:,} draws have zero weight under the target."
                if info["draws"] > info["draws_used"] else "")]
    lines.append("A reweighting cannot reach beyond the chain: where the target is much narrower than the chain or "
                 "lies in its tail the weights degenerate, which the effective sample size and k̂ below measure.")
    return lines + _weights_and_verdict(info, engine, latex)


def _weights_and_verdict(info: dict, engine: dict | None, latex: bool = False) -> list[str]:
    et = float(info["ess_target"])
    lines = []
    lines.append(f"Weights: Kish effective sample size {info['ess']:,.0f} of {info['draws_used']:,} draws "
                 f"(target ≥ {et:g}); Pareto k̂ = {info['khat']:.2f} (estimates are reliable for "
                 f"k̂ < {info['khat_max']:g}, and for S draws below min(1 − 1/log₁₀ S, 0.7) = "
                 f"{info['khat_threshold']:.2f}: Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25, 72); "
                 f"the largest single weight is {100 * info['max_weight']:.2g} % of the total.")
    if engine is not None and engine.get("ln_z") is not None and np.isfinite(engine["ln_z"]):
        lines.append(f"Evidence: ln Z = {format_value(engine['ln_z'], engine['ln_z_err'], tex=False)} "
                     "(the mean importance weight over the proposal, with its delta-method error).")
    lines.append("Mean, sd and central intervals use the normalised weights; the 68 % and 95 % intervals run "
                 "from the 16th to the 84th and the 2.5th to the 97.5th weighted percentile (equal weight in "
                 "each tail), the sorted draws being placed at the mid-points of their weight, stretched so the "
                 "extreme draws sit at 0 and 1 (for equal weights, definition 7 of Hyndman & Fan 1996).")
    best = info["best"]
    lines.append(f"Best exact draw: the draw with the highest exact log-posterior (draw {best['index']}; "
                 f"ln P = {best['log_post']:.3f}, −2 ln L = {_num(-2 * best['log_like'], '.2f')}); not an "
                 "optimised maximum.")
    met, missing = _weighted_verdict(info, engine)
    reweighted = engine is not None and engine.get("reweighted")
    rule = (f"the chain's stopping rule, weight ESS ≥ target, k̂ < {info['khat_max']:g}" if reweighted else
            "the engine's stopping rule: surrogate chain converged, weight ESS ≥ target, k̂ < "
            f"{info['khat_max']:g}" if engine is not None else
            "judged on the weights alone: the engine's record, with its surrogate chain, was not given")
    if met:
        verdict = f"**Converged** ({rule})."
    else:
        verdict = (f"**Not converged** ({rule}): " + "; ".join(missing) + ". Do not quote these numbers yet; "
                   + ("a longer chain gives more draws to reweight, or sample the target directly." if reweighted
                      else "resuming the run adds correction rounds."))
    if info.get("low_ess"):
        verdict += (f" {len(info['low_ess'])} quantit{'y has' if len(info['low_ess']) == 1 else 'ies have'} "
                    f"fewer effective draws for the mean than {et:g} ({', '.join(info['low_ess'])}, marked "
                    f"{'dagger' if latex else FLAG}).")
    lines.append(verdict)
    if info["khat"] < info["khat_max"] and not info["khat"] < info["khat_threshold"]:
        lines.append(f"Caution: k̂ = {info['khat']:.2f} is below {info['khat_max']:g} but above the bound "
                     f"{info['khat_threshold']:.2f} for {info['draws_used']:,} draws (Vehtari et al. 2024): "
                     "the Monte Carlo errors may be underestimated until the sample grows.")
    if info.get("nonfinite"):
        lines.append("Non-finite values were left out (and the weights renormalised): " + ", ".join(
            f"{k} {v} draw(s)" for k, v in info["nonfinite"].items()) + ".")
    return lines


WEIGHTED_HEADINGS = ("Quantity", "Mean ± sd", "Median", "Central 68 %", "Central 95 % (or bound)",
                     "Best exact draw", "Monte Carlo error: mean / 68 % ends", "Effective draws for the mean")


def weighted_markdown_table(cons: list[Constraint], info: dict, meta: dict | None = None,
                            engine: dict | None = None) -> str:
    """The Markdown report of an importance-weighted exact sample (`weighted_constraints` rows and info;
    ``engine``: `infer.analysis.weighted.engine_info`). No chain diagnostics (R̂, τ, chain ESS) appear in
    the rows: the weights' Monte Carlo errors and effective draws take their place, and the surrogate
    chain's R̂ is quoted once, in the preamble, as a property of the proposal."""
    et = float(info["ess_target"])
    lines = ["# Marginal constraints", ""] + _meta_lines(meta or {})
    lines += [f"- {line}" for line in _weighted_preamble(info, engine)]
    lines += ["", "| " + " | ".join(WEIGHTED_HEADINGS) + " |", "|" + "---|" * len(WEIGHTED_HEADINGS)]
    any_flag = False
    for c in cons:
        flag = c.flagged(math.nan, et)
        any_flag |= flag
        err = c.mcse or {}
        ends = max(err.get("lo68", math.nan), err.get("hi68", math.nan))
        lines.append("| " + " | ".join(_row_cells(c, flag) + [
            f"{_sig2(err.get('mean', math.nan))} / {_sig2(ends)}", _num(c.ess_weight, ".0f")]) + " |")
    notes = ["Monte Carlo errors come from the weights, for independent proposal draws (delta method for "
             "self-normalised importance sampling, Owen 2013, ch. 9; a percentile's error is that of the "
             "weighted CDF carried through the quantile function; the larger of the two 68 % ends is shown). "
             "Effective draws for the mean = sd² / (its Monte Carlo error)²."]
    if any_flag:
        notes.append(f"{FLAG} Fewer effective draws for this quantity's mean than the target {et:g}: its Monte "
                     "Carlo error is larger than the run aimed for.")
    notes += _shared_notes(any(c.limit is not None for c in cons), info)
    lines += [""] + notes
    return "\n".join(lines) + "\n"
