"""Marginal constraints of a run, the tables that report them, and the files a paper needs.

Method
------
* Burn-in. Unless the user gives one, the first ``factor × τ_max`` steps are discarded, with τ_max the
  largest integrated autocorrelation time of the sampled parameters measured on the whole run
  (`infer.diagnostics.burn_in`; the "a few τ" rule of Foreman-Mackey et al. 2013, PASP 125, 306, §6 and
  Goodman & Weare 2010, CAMCoS 5, 65). The rule used is written into every table.
* Marginals. Every kept draw of every walker of every ensemble is pooled. Mean and standard deviation
  (``ddof=1``) are the sample moments; the 68 % and 95 % intervals are *equal-tailed*: the 0.16/0.84 and
  0.025/0.975 sample quantiles (``numpy.quantile``, linear interpolation, Hyndman & Fan 1996, Am. Stat. 50,
  361, definition 7). The "best sample" is the kept draw with the highest log-posterior, not an optimised
  maximum.
* Convergence. R̂ (rank-normalised split R̂), bulk and tail ESS of Vehtari et al. 2021, Bayesian Analysis
  16, 667, computed by `infer.diagnostics.all_diagnostics` on the kept draws. Their recommended thresholds,
  R̂ < 1.01 and ESS > 400 (100 per chain for four chains), are the defaults here.
* One-sided limits. A sampled parameter whose marginal piles up against an edge of its prior support
  (``Samples.bounds``) is reported as a one-sided 95 % limit instead of an interval; see `edge_limit`
  for the rule.
* Rounding. Numbers are quoted to two significant digits of their uncertainty and the value to the same
  decimal place (common practice); see `format_value`.
* Asymmetric errors. A 68 % interval is quoted as ``median^{+a}_{-b}`` (a = hi68 − median,
  b = median − lo68) when |a − b| > 20 % of (a + b)/2, and as ``mean ± sd`` otherwise; see
  `ASYMMETRY_THRESHOLD`.

Assumptions: ensembles are independent chains; walkers of one ensemble are not (R̂ treats them as such
only through `infer.diagnostics`); draws with a non-finite log-posterior never appear in a chain.
"""
from __future__ import annotations

import hashlib
import json
import math
import os
import secrets
from dataclasses import asdict, dataclass
from decimal import ROUND_HALF_UP, Decimal
from pathlib import Path

import numpy as np

from infer.analysis import diagnostics
from infer.errors import UserError
from infer.analysis.samples import Samples

#: R̂ above this flags a row (Vehtari et al. 2021, Bayesian Analysis 16, 667, §4).
RHAT_TARGET = 1.01
#: Bulk or tail ESS below this flags a row (same paper: 100 per chain, four chains).
ESS_TARGET = 400.0
#: Burn-in = BURN_FACTOR × max τ when not given (`infer.diagnostics.burn_in`).
BURN_FACTOR = 5.0
#: A one-sided limit is reported when the edge density is at least this fraction of the peak density.
EDGE_PEAK_RATIO = 0.5
#: Width of the edge strip as a fraction of the prior range (upper bound on the strip width).
EDGE_STRIP = 0.05
#: Asymmetric form when |a − b| exceeds this fraction of (a + b)/2.
ASYMMETRY_THRESHOLD = 0.2
#: Marker on flagged rows of the tables.
FLAG = "‡"

_MANIFEST = ".infer-summary-files.json"


@dataclass
class Constraint:
    """Marginal summary of one sampled or derived quantity (all from the kept, pooled draws)."""

    name: str
    tex: str
    mean: float
    sd: float
    median: float
    lo68: float
    hi68: float
    lo95: float
    hi95: float
    best: float          # value at the kept draw with the highest log-posterior
    rhat: float
    ess_bulk: float
    ess_tail: float
    tau: float
    limit: tuple[str, float] | None = None   # ("upper", q95) or ("lower", q05) when piled on a prior edge
    sampled: bool = True

    def flagged(self, rhat_target: float = RHAT_TARGET, ess_target: float = ESS_TARGET) -> bool:
        """True when R̂ or either ESS misses its target (or could not be computed)."""
        if self.sd == 0:
            return False                     # a constant has nothing to converge
        vals = (self.rhat, self.ess_bulk, self.ess_tail)
        if not all(np.isfinite(v) for v in vals):
            return True
        return self.rhat > rhat_target or min(self.ess_bulk, self.ess_tail) < ess_target

    @property
    def asymmetric(self) -> bool:
        up, down = self.hi68 - self.median, self.median - self.lo68
        return abs(up - down) > ASYMMETRY_THRESHOLD * 0.5 * (up + down)


# --------------------------------------------------------------------------------------------------
# constraints


def edge_limit(x: np.ndarray, lo: float, hi: float) -> tuple[str, float] | None:
    """One-sided 95 % limit of draws ``x`` that pile up on an edge of the prior support [lo, hi].

    Rule (ours, stated in every table): take a strip width h = min(5 % of the prior range,
    (q84 − q16)/4). The posterior density next to an edge is the fraction of draws within h of that
    edge divided by h; the peak density is the largest bin of a histogram of the draws with bins of
    width h laid from the same edge. If the density next to the lower edge is at least half the peak
    density, the marginal is piled on that edge and an upper limit (the 0.95 quantile) is returned;
    symmetrically a lower limit (the 0.05 quantile) for the upper edge. Scaling h by the posterior
    width keeps a narrow peak that merely sits close to an edge (several σ away) from being flagged,
    while a half-normal-like marginal is flagged for any h ≲ σ. If both edges qualify the
    marginal fills the prior, no limit is meaningful and None is returned (the caller marks it as
    prior-dominated).
    """
    x = np.asarray(x, dtype=float).ravel()
    if x.size < 20 or not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo:
        return None
    q16, q84 = np.quantile(x, [0.16, 0.84])
    h = min(EDGE_STRIP * (hi - lo), (q84 - q16) / 4.0)
    if not h > 0:
        return None

    def piled(edge_dist: np.ndarray) -> bool:
        # edge_dist ≥ 0: distance of each draw from the edge under test
        nbin = min(int(np.ceil(edge_dist.max() / h)) + 1, 100_000)   # far outliers share the last bin
        counts = np.bincount(np.minimum((edge_dist / h).astype(np.int64), nbin - 1), minlength=nbin)
        return counts[0] >= EDGE_PEAK_RATIO * counts.max()

    at_lo = piled(np.clip(x - lo, 0.0, None))
    at_hi = piled(np.clip(hi - x, 0.0, None))
    if at_lo and at_hi:
        return None
    if at_lo:
        return ("upper", float(np.quantile(x, 0.95)))
    if at_hi:
        return ("lower", float(np.quantile(x, 0.05)))
    return None


def _auto_burn(samples: Samples) -> tuple[int, str, float]:
    steps, n_ens, n_walk, n_par = samples.position.shape
    # τ only, with the convention of `diagnostics.all_diagnostics`: one sequence per walker
    taus = [diagnostics.autocorr_time(samples.position[..., p].reshape(steps, n_ens * n_walk).T)
            for p in range(n_par)]
    taus = [t for t in taus if np.isfinite(t)]
    tau_max = float(max(taus)) if taus else float("nan")
    burn = int(diagnostics.burn_in(tau_max, steps, factor=BURN_FACTOR))
    if not np.isfinite(tau_max):
        return burn, "no autocorrelation time could be measured, so half the chain", tau_max
    rule = (f"{BURN_FACTOR:g} × τ_max with τ_max = {tau_max:.3g} steps, the largest integrated "
            "autocorrelation time of the sampled parameters over the whole run")
    if burn < math.ceil(BURN_FACTOR * tau_max):
        rule += "; capped at half the chain"
    if steps < 50 * tau_max:
        rule += "; the chain is shorter than 50 τ_max, so τ_max itself is uncertain"
    return burn, rule, tau_max


def constraints(samples: Samples, burn: int | None = None, *, ess_target: float | None = None,
                rhat_target: float = RHAT_TARGET, burn_rule: str | None = None
                ) -> tuple[list[Constraint], dict]:
    """Marginal constraints of every sampled and derived quantity after burn-in.

    ``burn`` None chooses it automatically (module docstring); a given ``burn`` is used as is and
    ``burn_rule`` (default "given by the caller") says in the tables how it was chosen. R̂ and ESS
    targets default to `RHAT_TARGET` and `ESS_TARGET`.

    Returns the constraints (sampled first, then derived, in chain order) and an ``info`` dict: burn,
    burn_rule, tau_max (nan when burn was given), steps (total), steps_kept, ensembles, walkers, draws,
    rhat_target, ess_target, converged (every non-constant quantity meets both targets), worst
    (largest R̂, smallest ESS), best (step in the full chain, ensemble, walker, log_post, log_like of the
    best sample), prior_dominated (names whose marginal fills the prior), nonfinite ({name: count} of
    non-finite draws left out).
    """
    if samples.position.ndim != 4:
        raise UserError(f"samples: position must have shape (steps, ensembles, walkers, parameters), "
                        f"got {samples.position.shape}")
    steps, n_ens, n_walk, _ = samples.position.shape
    if steps < 1:
        raise UserError("samples: the chain holds no steps yet")
    if burn is None:
        burn, rule, tau_max = _auto_burn(samples)
    else:
        if isinstance(burn, bool) or int(burn) != burn or burn < 0:
            raise UserError(f"burn-in: {burn!r} is not a non-negative whole number of steps")
        burn, rule, tau_max = int(burn), burn_rule or "given by the caller", float("nan")
    if burn >= steps:
        raise UserError(f"burn-in: {burn} steps leave nothing of a chain of {steps} steps "
                        f"({rule}); run longer or give a smaller burn-in")
    kept = samples.after(burn)
    ess_target = float(ESS_TARGET if ess_target is None else ess_target)

    names = list(kept.all_names)
    stacked = np.concatenate([kept.position, kept.derived], axis=-1) if kept.derived_names else kept.position
    diag = diagnostics.all_diagnostics(stacked, names)

    lp = np.where(np.isfinite(kept.log_post), kept.log_post, -np.inf)
    ibest = np.unravel_index(int(np.argmax(lp)), lp.shape)

    cons: list[Constraint] = []
    prior_dominated = []
    nonfinite: dict[str, int] = {}
    for name in names:
        col = kept.column(name)
        x = col.ravel()
        good = np.isfinite(x)
        if not good.all():
            nonfinite[name] = int((~good).sum())
            x = x[good]
        if x.size == 0:
            raise UserError(f"samples: quantity {name!r} has no finite values after burn-in")
        q = np.quantile(x, [0.5, 0.16, 0.84, 0.025, 0.975])
        sampled = name in kept.names
        limit = None
        if sampled and name in kept.bounds:
            lo, hi = (float(v) for v in kept.bounds[name])
            limit = edge_limit(x, lo, hi)
            if limit is None and _fills_prior(x, lo, hi):
                prior_dominated.append(name)
        d = diag.get(name, {})
        cons.append(Constraint(
            name=name, tex=kept.label(name), mean=float(np.mean(x)),
            sd=float(np.std(x, ddof=1)) if x.size > 1 else float("nan"),
            median=float(q[0]), lo68=float(q[1]), hi68=float(q[2]), lo95=float(q[3]), hi95=float(q[4]),
            best=float(col[ibest]), rhat=float(d.get("rhat", np.nan)), ess_bulk=float(d.get("ess_bulk", np.nan)),
            ess_tail=float(d.get("ess_tail", np.nan)), tau=float(d.get("tau", np.nan)), limit=limit,
            sampled=sampled))

    judged = [c for c in cons if c.sd != 0]          # constants have nothing to converge
    rhats = [c.rhat for c in judged]
    esss = [min(c.ess_bulk, c.ess_tail) for c in judged]
    worst = {"rhat_max": float(np.max(rhats)) if rhats else float("nan"),
             "ess_min": float(np.min(esss)) if esss else float("nan")}
    converged = not any(c.flagged(rhat_target, ess_target) for c in judged)
    info = {
        "burn": burn, "burn_rule": rule, "tau_max": tau_max, "steps": steps, "steps_kept": steps - burn,
        "ensembles": n_ens, "walkers": n_walk, "draws": int((steps - burn) * n_ens * n_walk),
        "rhat_target": float(rhat_target), "ess_target": ess_target, "converged": converged,
        "worst": worst, "prior_dominated": prior_dominated, "nonfinite": nonfinite,
        "best": {"step": int(ibest[0]) + burn, "ensemble": int(ibest[1]), "walker": int(ibest[2]),
                 "log_post": float(kept.log_post[ibest]), "log_like": float(kept.log_like[ibest])},
    }
    return cons, info


def _fills_prior(x: np.ndarray, lo: float, hi: float) -> bool:
    """Both edges carry at least half the peak density (the marginal is as wide as the prior)."""
    if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo:
        return False
    counts = np.histogram(x, bins=int(round(1 / EDGE_STRIP)), range=(lo, hi))[0]
    return bool(counts.max() > 0 and min(counts[0], counts[-1]) >= EDGE_PEAK_RATIO * counts.max())


# --------------------------------------------------------------------------------------------------
# rounding


def _dec(x: float) -> Decimal:
    return Decimal(repr(float(x)))


def _decimal_place(err: Decimal, sig: int) -> int:
    """Exponent of the last quoted digit when ``err`` is given to ``sig`` significant digits."""
    place = err.adjusted() - (sig - 1)
    rounded = err.quantize(Decimal(1).scaleb(place), rounding=ROUND_HALF_UP)
    if rounded.adjusted() > err.adjusted():        # 0.0996 → 0.10: one digit fewer after rounding up
        place += 1
    return place


def _fmt_at(v: Decimal, place: int) -> str:
    q = v.quantize(Decimal(1).scaleb(place), rounding=ROUND_HALF_UP)
    if q == 0:
        q = abs(q)                                  # no "-0.00"
    return f"{q:f}" if place < 0 else f"{q.quantize(Decimal(1)):f}"


def _sci_exponent(*vals: float) -> int:
    """Power of ten to factor out: that of the largest magnitude when it is ≥ 10^4 or < 10^-3."""
    big = max((abs(v) for v in vals if np.isfinite(v) and v != 0), default=0.0)
    if big == 0:
        return 0
    n = int(math.floor(math.log10(big)))
    return n if (n >= 4 or n <= -3) else 0


def rounded(x: float, *errs: float, sig: int = 2) -> tuple[list[str], int]:
    """Strings of ``x`` and ``errs`` rounded at the decimal place of 2 significant digits of the
    smallest positive error, after factoring out 10^n (returned; 0 when none)."""
    n = _sci_exponent(x, *errs)
    good = [e for e in errs if np.isfinite(e) and e > 0]
    if not np.isfinite(x):
        return [str(x)] + [str(e) for e in errs], 0
    xd = _dec(x).scaleb(-n)
    if not good:
        return [f"{float(xd):.6g}"] + ["0" if e == 0 else str(e) for e in errs], n
    place = _decimal_place(_dec(min(good)).scaleb(-n), sig)
    out = [_fmt_at(xd, place)]
    for e in errs:
        out.append(_fmt_at(_dec(e).scaleb(-n), place) if np.isfinite(e) else str(e))
    return out, n


def _wrap(body: str, n: int, tex: bool, paren: bool = True) -> str:
    if n == 0:
        return body
    if tex:
        return (f"({body})" if paren else body) + rf" \times 10^{{{n}}}"
    return (f"({body})" if paren else body) + f" ×10^{n}"


def format_value(x: float, err: float, tex: bool = True) -> str:
    """``x ± err`` rounded by the uncertainty.

    The error keeps two significant digits (after rounding, so 0.0996 → 0.10) and the value is rounded
    to the same decimal place, half away from zero on the decimal representation. Values of magnitude
    ≥ 10^4 or < 10^-3 have their power of ten factored out: ``(2.100 \\pm 0.030) \\times 10^{-9}``.
    A zero or non-finite error gives the value to six significant digits. ``tex=False`` uses "±" and
    "×10^n" for plain text.
    """
    (xs, es), n = rounded(x, err)
    if not (np.isfinite(err) and err > 0):
        return _wrap(xs, n, tex, paren=False)
    pm = r" \pm " if tex else " ± "
    return _wrap(xs + pm + es, n, tex)


def format_asym(x: float, up: float, down: float, tex: bool = True) -> str:
    """``x^{+up}_{-down}`` rounded by the smaller of the two errors (plain text: ``x +up/−down``)."""
    (xs, us, ds), n = rounded(x, up, down)
    body = f"{xs}^{{+{us}}}_{{-{ds}}}" if tex else f"{xs} +{us}/−{ds}"
    return _wrap(body, n, tex)


def format_interval(lo: float, hi: float, scale: float, tex: bool = False) -> str:
    """``[lo, hi]`` rounded at the decimal place of 2 significant digits of ``scale``."""
    if not (np.isfinite(scale) and scale > 0):
        return f"[{lo:.6g}, {hi:.6g}]"
    n = _sci_exponent(lo, hi, scale)
    place = _decimal_place(_dec(scale).scaleb(-n), 2)
    body = f"[{_fmt_at(_dec(lo).scaleb(-n), place)}, {_fmt_at(_dec(hi).scaleb(-n), place)}]"
    return _wrap(body, n, tex, paren=False)


def format_number(v: float, scale: float, tex: bool = False) -> str:
    """One number rounded at the place of 2 significant digits of ``scale``."""
    if not np.isfinite(v):
        return "—"
    if not (np.isfinite(scale) and scale > 0):
        return f"{v:.6g}"
    n = _sci_exponent(v, scale)
    place = _decimal_place(_dec(scale).scaleb(-n), 2)
    return _wrap(_fmt_at(_dec(v).scaleb(-n), place), n, tex, paren=False)


def _width(c: Constraint) -> float:
    """Rounding scale of a quantity: the smaller half of its 68 % interval (sd if degenerate)."""
    a, b = c.hi68 - c.median, c.median - c.lo68
    w = min(a, b)
    return w if w > 0 else c.sd


# --------------------------------------------------------------------------------------------------
# tables


def _verdict(cons: list[Constraint], info: dict) -> str:
    rt, et = info.get("rhat_target", RHAT_TARGET), info.get("ess_target", ESS_TARGET)
    judged = [c for c in cons if c.sd != 0]
    rhats = [c.rhat for c in judged if np.isfinite(c.rhat)]
    esss = [min(c.ess_bulk, c.ess_tail) for c in judged if np.isfinite(min(c.ess_bulk, c.ess_tail))]
    rmax, emin = max(rhats, default=float("nan")), min(esss, default=float("nan"))
    bad = [c.name for c in judged if c.flagged(rt, et)]
    head = (f"largest R̂ = {rmax:.4f} (target ≤ {rt:g}), smallest bulk/tail ESS = {emin:.0f} "
            f"(target ≥ {et:g}) over all sampled and derived quantities")
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
    if meta.get("chi2_best") is not None:
        line = f"- Best sample fit: χ² = {float(meta['chi2_best']):.1f}"
        if meta.get("n_bins") is not None:
            line += f" for {meta['n_bins']} band powers"
        if meta.get("dof") is not None:
            line += f" ({meta['dof']} degrees of freedom"
            line += f", PTE = {float(meta['pte_best']):.3f})" if meta.get("pte_best") is not None else ")"
        out.append(line + ".")
    elif meta.get("n_bins") is not None:
        out.append(f"- Band powers: {meta['n_bins']}")
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


def _ess(c: Constraint) -> str:
    f = lambda v: f"{v:.0f}" if np.isfinite(v) else "—"
    return f"{f(c.ess_bulk)} / {f(c.ess_tail)}"


def markdown_table(cons: list[Constraint], info: dict, meta: dict | None = None) -> str:
    """A Markdown report: what was summarised, the convergence verdict, then one row per quantity."""
    meta = meta or {}
    rt, et = info.get("rhat_target", RHAT_TARGET), info.get("ess_target", ESS_TARGET)
    lines = ["# Parameter constraints", ""]
    lines += _meta_lines(meta)
    lines += [
        f"- Chain: {info['ensembles']} ensemble(s) × {info['walkers']} walkers × {info['steps']} steps.",
        f"- Burn-in discarded: the first {info['burn']} steps ({info['burn_rule']}); "
        f"{info['steps_kept']:,} steps kept, {info['draws']:,} draws pooled over all walkers and ensembles.",
        "- Intervals are equal-tailed: 68 % from the 16th to the 84th percentile, 95 % from the 2.5th to "
        "the 97.5th percentile of the pooled draws.",
        f"- Best sample: the kept draw with the highest log-posterior (ln P = {info['best']['log_post']:.3f}, "
        f"−2 ln L = {-2 * info['best']['log_like']:.2f}); not an optimised maximum.",
        f"- {_verdict(cons, info)}",
    ]
    if info["ensembles"] == 1:
        lines.append("- With a single ensemble R̂ only compares the two halves of the run; independent "
                     "ensembles are needed for a between-chain test.")
    if info.get("nonfinite"):
        lines.append("- Non-finite values were left out: " + ", ".join(
            f"`{k}` {v} draw(s)" for k, v in info["nonfinite"].items()) + ".")
    lines += [
        "",
        "| Quantity | Mean ± sd | Median | 68 % interval (equal-tailed) | 95 % interval (equal-tailed) "
        "| Best sample | R̂ | ESS bulk / tail | τ [steps] |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    any_flag = any_limit = False
    for c in cons:
        s = _width(c)
        flag = c.flagged(rt, et)
        any_flag |= flag
        name = f"`{c.name}` ${c.tex}$" + (f" {FLAG}" if flag else "")
        if not c.sampled:
            name += " (derived)"
        if c.limit is not None:
            any_limit = True
            kind, v = c.limit
            sign = "<" if kind == "upper" else ">"
            ci95 = f"{sign} {format_number(v, s)} (one-sided 95 %) §"
        else:
            ci95 = format_interval(c.lo95, c.hi95, s)
        tau = f"{c.tau:.1f}" if np.isfinite(c.tau) else "—"
        rhat = f"{c.rhat:.4f}" if np.isfinite(c.rhat) else "—"
        lines.append(" | ".join([
            f"| {name}", format_value(c.mean, c.sd, tex=False), format_number(c.median, s),
            format_interval(c.lo68, c.hi68, s), ci95, format_number(c.best, s), rhat, _ess(c), f"{tau} |"]))
    notes = []
    if any_flag:
        notes.append(f"{FLAG} R̂ > {rt:g} or bulk/tail ESS < {et:g} (Vehtari et al. 2021, Bayesian "
                     "Analysis 16, 667), or the diagnostics are undefined (non-finite values): this row is "
                     "not yet reliable.")
    if any_limit:
        notes.append(
            "§ The marginal piles up on an edge of the prior: the density within h of the edge is at least "
            f"{EDGE_PEAK_RATIO:g} × its peak density, with h = min({100 * EDGE_STRIP:g} % of the prior range, "
            "a quarter of the 68 % width). A one-sided 95 % limit (95th or 5th percentile) is quoted.")
    if info.get("prior_dominated"):
        notes.append("The marginal of " + ", ".join(f"`{n}`" for n in info["prior_dominated"])
                     + " fills its whole prior range: the data do not constrain it.")
    notes.append("Numbers are rounded to two significant digits of their uncertainty (the smaller half of "
                 "the 68 % interval for medians and intervals, sd for the mean).")
    lines += [""] + notes
    return "\n".join(lines) + "\n"


def _ascii(s: str) -> str:
    """Plain ASCII for LaTeX comments (a table must compile without input-encoding packages)."""
    for a, b in (("×", "x"), ("τ", "tau"), ("R̂", "R-hat"), ("≤", "<="), ("≥", ">="), ("−", "-"), ("σ", "sigma")):
        s = s.replace(a, b)
    return s.encode("ascii", "replace").decode("ascii")


def _tex_escape(s: str) -> str:
    return s.replace("\\", r"\textbackslash{}").replace("_", r"\_").replace("%", r"\%").replace("&", r"\&")


def latex_table(cons: list[Constraint], info: dict) -> str:
    """A plain ``tabular`` (no packages) of the marginal constraints, ready for ``\\input``.

    68 % column: ``mean \\pm sd`` for near-symmetric marginals and ``median^{+a}_{-b}`` when
    |a − b| > 20 % of (a + b)/2 (`ASYMMETRY_THRESHOLD`); a one-sided 95 % limit ``< v`` / ``> v`` when
    the marginal piles up on a prior edge. 95 % column: the equal-tailed interval.
    """
    rt, et = info.get("rhat_target", RHAT_TARGET), info.get("ess_target", ESS_TARGET)
    out = [
        "% Marginal constraints written by infer (equal-tailed intervals of the pooled draws).",
        f"% Burn-in: first {info['burn']} of {info['steps']} steps discarded ({_ascii(info['burn_rule'])}).",
        f"% Draws: {info['draws']} from {info['ensembles']} ensemble(s) x {info['walkers']} walkers.",
        f"% Convergence: {'all' if info.get('converged') else 'NOT all'} quantities have "
        f"R-hat <= {rt:g} and bulk/tail ESS >= {et:g}.",
        "% 68% column: mean \\pm sd, or median^{+a}_{-b} when |a-b| > "
        f"{100 * ASYMMETRY_THRESHOLD:g}% of (a+b)/2; limits are one-sided 95%.",
        r"\begin{tabular}{lcc}",
        r"\hline",
        r"Parameter & 68\,\% limits & 95\,\% limits \\",
        r"\hline",
    ]
    for c in cons:
        label = f"${c.tex}$" if c.tex else _tex_escape(c.name)
        s = _width(c)
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
        if c.flagged(rt, et):
            label = f"${c.tex}{{}}^\\dagger$" if c.tex else label + r"$^\dagger$"
        out.append(f"{label} & {col68} & {col95} \\\\")
    out += [r"\hline", r"\end{tabular}"]
    if any(c.flagged(rt, et) for c in cons):
        out.append(f"% dagger: R-hat > {rt:g} or ESS < {et:g}; not yet reliable.")
    return "\n".join(out) + "\n"


# --------------------------------------------------------------------------------------------------
# files


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _load_manifest(outdir: Path) -> dict:
    p = outdir / _MANIFEST
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


def _write_atomic(path: Path, writer) -> None:
    """``writer(tmp)`` fills a new hidden file next to ``path``, which is then renamed onto ``path``.

    The temporary file is created exclusively with mode 0666 & ~umask, so the result has the
    permissions of any file the user creates (not the 0600 of `tempfile.mkstemp`)."""
    while True:
        tmp = str(path.parent / f".{path.name}.{secrets.token_hex(6)}{path.suffix or '.tmp'}")
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
            break
        except FileExistsError:
            continue
    os.close(fd)
    try:
        writer(tmp)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_summary(samples: Samples, outdir, burn: int | None = None, dataset=None, best_model=None,
                  ess_target: float | None = None, *, burn_rule: str | None = None) -> dict[str, Path]:
    """Write constraints.md, constraints.tex, triangle.png, traces.png, convergence.png (and
    bandpowers.png when ``dataset`` and ``best_model`` are given) into ``outdir``.

    ``outdir`` is created with its parents. A file is only replaced when a previous summary wrote it and
    it is unchanged since (a hidden record of names and SHA-256 digests is kept in ``outdir``); anything
    else makes the call fail before any file is written. Each file is written to a temporary name and
    renamed into place. Returns {"markdown", "latex", "triangle", "traces", "convergence"[,
    "bandpowers"]: path}.
    """
    from infer.report import figures as plots  # matplotlib only when figures are asked for

    outdir = Path(outdir).expanduser().resolve()
    if os.path.lexists(outdir) and not outdir.is_dir():
        raise UserError(f"{outdir}: output path exists and is not a directory")
    if (dataset is None) != (best_model is None):
        raise UserError("summary: the band-power figure needs both the data set and the best-sample model")
    if best_model is not None:
        best_model = np.asarray(best_model, dtype=float)
        if best_model.shape != np.shape(dataset.value):
            raise UserError(f"summary: best-sample model has shape {best_model.shape}, the data set "
                            f"has {np.shape(dataset.value)} band powers")

    cons, info = constraints(samples, burn, ess_target=ess_target, burn_rule=burn_rule)
    kept = samples.after(info["burn"])
    meta = dict(samples.meta)

    targets = {"markdown": "constraints.md", "latex": "constraints.tex", "triangle": "triangle.png",
               "traces": "traces.png", "convergence": "convergence.png"}
    if dataset is not None:
        targets["bandpowers"] = "bandpowers.png"
    try:
        outdir.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise UserError(f"{outdir}: cannot create output directory ({err.strerror})") from None
    manifest = _load_manifest(outdir)
    paths = {k: outdir / v for k, v in targets.items()}
    for p in paths.values():
        _check_target(p, manifest)

    md = markdown_table(cons, info, meta)
    tex = latex_table(cons, info)

    def text_writer(s):
        def w(tmp):
            with open(tmp, "w", encoding="utf-8") as fh:
                fh.write(s)
        return w

    history = plots.convergence_history(samples)
    writers = {
        "markdown": text_writer(md),
        "latex": text_writer(tex),
        "triangle": lambda tmp: plots.triangle(kept, list(samples.names), tmp,
                                               best={c.name: c.best for c in cons}),
        "traces": lambda tmp: plots.traces(samples, tmp, info["burn"]),
        "convergence": lambda tmp: plots.convergence(history, tmp, rhat_target=info["rhat_target"],
                                                     ess_target=info["ess_target"]),
    }
    if dataset is not None:
        writers["bandpowers"] = lambda tmp: plots.bandpowers(dataset, best_model, tmp)
    for key, p in paths.items():
        _write_atomic(p, writers[key])
        manifest[p.name] = _sha256(p)
        _write_atomic(outdir / _MANIFEST, text_writer(json.dumps({"files": manifest}, indent=1)))
    return paths


def constraints_as_dicts(cons: list[Constraint]) -> list[dict]:
    """Plain-value form of the constraints (for JSON or tests)."""
    return [asdict(c) for c in cons]
