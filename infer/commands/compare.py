"""``infer compare CHAIN1 CHAIN2 [...] --out DIR``: several runs side by side.

Writes into DIR: overlay.png (every run in one triangle plot, `infer.report.figures.overlay`),
comparison.md and comparison.tex (mean ± sd of each quantity per run; the shift between each pair of
runs, Raveri & Hu 2019, with its caveat; Bayes factors where both runs carry ln Z). The analysis is
`infer.analysis.compare`; chains are read with `infer.report.export.load_run` (the summary's burn-in rule).
As with the summary, a file in DIR is replaced only when an earlier ``infer summarize``/``compare`` wrote it
and it is unchanged since (the folder's record of written files); anything else under one of the names
makes the command stop before reading a chain. `compare_files` is the library function.
"""
from __future__ import annotations

import json
import math
import os
from pathlib import Path

from infer.commands import integer
from infer.errors import UserError

FILES = {"overlay": "overlay.png", "markdown": "comparison.md", "latex": "comparison.tex"}


def register(sub) -> None:
    c = sub.add_parser("compare", help="several runs side by side: overlay plot, table, shifts, Bayes factors")
    c.add_argument("chains", nargs="+", metavar="CHAIN", help="chain files (either engine), two or more")
    c.add_argument("--out", required=True, help="output folder")
    c.add_argument("--params", help="comma-separated quantities to compare (each chain must hold all of them; "
                                    "required when the chains' sampled parameters differ)")
    c.add_argument("--burn", type=integer(0, "steps to discard"),
                   help="steps to discard from every ensemble chain (default: automatic from τ per chain)")
    c.add_argument("--pairs", type=integer(500, "difference draws"), default=16000,
                   help="draws of the parameter-difference posterior per pair of runs (default 16000)")
    c.set_defaults(func=run)


def run(args) -> int:
    params = None if args.params is None else [p.strip() for p in args.params.split(",") if p.strip()]
    print(compare_files(args.chains, args.out, params=params, burn=args.burn, pairs=args.pairs))
    return 0


# -- output folder --------------------------------------------------------------------------------------


def check_folder(out):
    """The output folder and its record of written files, checked before any work (see module docstring)."""
    from infer import paths
    from infer.report.summary import MANIFEST, _check_target, _load_manifest
    out = Path(out).expanduser().resolve()
    if os.path.lexists(out) and not out.is_dir():
        raise UserError(f"{out}: output path exists and is not a directory")
    paths.file_folder(out / MANIFEST)
    manifest = _load_manifest(out)
    for name in FILES.values():
        _check_target(out / name, manifest)
    return out, manifest


def _write(out: Path, manifest: dict, fills: dict) -> dict:
    from infer.atomic import write_atomic, write_text_atomic
    from infer.report.summary import MANIFEST, _sha256
    written = {}
    for key, fill in fills.items():
        p = out / FILES[key]
        write_atomic(p, fill)
        manifest[p.name] = _sha256(p)
        write_text_atomic(out / MANIFEST, json.dumps({"files": manifest}, indent=1))
        written[key] = p
    return written


def _text(s: str):
    def fill(tmp):
        with open(tmp, "w", encoding="utf-8") as fh:
            fh.write(s)
    return fill


# -- the runs ---------------------------------------------------------------------------------------------


def data_id(run) -> str | None:
    """What the run fitted: the data file's SHA-256 with the run file's data selection (None if unknown)."""
    sha = run.provenance.get("dataset_sha256")
    if not sha:
        return None
    sel = {k: v for k, v in sorted((run.cfg.dataset if run.cfg is not None else {}).items()) if k != "file"}
    return json.dumps([sha, sel], sort_keys=True, default=str)


def labels(runs) -> list[str]:
    """Legend names: the run names, with the file name added where two runs share one."""
    names = [r.name for r in runs]
    out = [n if names.count(n) == 1 else f"{n} ({Path(r.path).name})" for n, r in zip(names, runs)]
    return [o if out.count(o) == 1 else f"{o} [{i + 1}]" for i, o in enumerate(out)]


def _constraints(run):
    from infer.analysis.marginals import constraints
    from infer.analysis.weighted import weighted_constraints
    targets = run.cfg.stopping if run.cfg is not None else None
    if run.weighted:
        cons, info = weighted_constraints(run.kept, targets=targets)
        ok = bool(info["weights_ok"]) and bool((run.report or {}).get("converged", True))
        how = (f"surrogate engine, {run.kept.n:,} weighted exact draws, Kish ESS {info['ess']:.0f}, "
               f"k̂ {info['khat']:.2f}")
    else:
        cons, info = constraints(run.samples, run.burn, targets=targets)
        ok = bool(info["converged"])
        how = (f"ensemble sampler, {info['ensembles']} × {info['walkers']} walkers, {info['steps_kept']:,} steps "
               f"after {info['burn']} of burn-in")
    return {c.name: c for c in cons}, ok, how


# -- the command ------------------------------------------------------------------------------------------


def compare_files(chains, out, *, params=None, burn=None, pairs: int = 16000, seed: int = 0) -> str:
    """``infer compare``: compare the runs of ``chains``; writes into ``out`` and returns the report text."""
    from infer.analysis import compare as cmp
    from infer.report.export import load_run
    from infer.report.figures.overlay import overlay
    if len(chains) < 2:
        raise UserError(f"compare: give at least two chains, got {len(chains)}")
    outdir, manifest = check_folder(out)
    runs = [load_run(c, burn if _engine(c) != "surrogate" else None) for c in chains]
    labs = labels(runs)
    names = cmp.common_parameters([(lab, r.names, r.all_names) for lab, r in zip(labs, runs)], params)
    table_names = list(names)
    if params is None:                         # shared derived quantities join the table, not the plots
        table_names += [d for d in runs[0].kept.derived_names if all(d in r.all_names for r in runs)]
    summaries = [_constraints(r) for r in runs]
    ids = [data_id(r) for r in runs]
    shifts = cmp.pair_shifts([(lab, r.kept, i) for lab, r, i in zip(labs, runs, ids)], names, pairs=pairs, seed=seed)
    factors = cmp.bayes_factors([(lab, r.ln_z, i) for lab, r, i in zip(labs, runs, ids)])
    md = markdown(labs, runs, summaries, table_names, shifts, factors)
    tex = latex(labs, summaries, table_names, shifts, factors)
    fills = {"overlay": lambda tmp: overlay(list(zip(labs, [r.kept for r in runs])), names, tmp),
             "markdown": _text(md), "latex": _text(tex)}
    written = _write(outdir, manifest, fills)
    lines = [f"compared {len(runs)} runs on {', '.join(names)}"]
    for s in shifts:
        lines.append(f"  shift {s.a} − {s.b}: {_sigma_text(s.result)} (Gaussian: {s.result.sigma_gauss:.2f}σ)"
                     + ("  [same data: Monte Carlo noise only]" if s.same_data else ""))
    for f in factors:
        lines.append(f"  ln B({f.a} / {f.b}) = {f.ln_b:.2f} ± {f.error:.2f}" if math.isfinite(f.ln_b)
                     else f"  ln B({f.a} / {f.b}): {f.reason}")
    lines.append(f"  note: {cmp.CAVEAT}")
    lines += [f"  {k:<10} {p}" for k, p in written.items()]
    return "\n".join(lines)


def _engine(chain):
    from infer.store.enginefile import engine_of
    return engine_of(chain)


# -- tables -----------------------------------------------------------------------------------------------


def _sigma_text(r) -> str:
    return (f"> {r.sigma:.2f}σ" if r.lower_bound else f"{r.sigma:.2f}σ") + f" (difference probability {r.mass:.3f})"


def _cell(c, tex: bool) -> str:
    from infer.report.rounding import format_value
    if c is None:
        return "—"
    return f"${format_value(c.mean, c.sd)}$" if tex else format_value(c.mean, c.sd, tex=False)


def markdown(labs, runs, summaries, names, shifts, factors) -> str:
    from infer.analysis.compare import CAVEAT, evidence_words
    from infer.report.tables import FLAG
    lines = ["# Runs compared", "", "| Run | Chain | Draws | Stopping targets | ln Z |", "|---|---|---|---|---|"]
    for lab, r, (_, ok, how) in zip(labs, runs, summaries):
        z = r.ln_z
        lines.append(f"| {lab} | `{r.path}` | {how} | {'met' if ok else f'NOT met {FLAG}'} | "
                     + (f"{z[0]:.3f} ± {z[1]:.3f}" if z else "—") + " |")
    heads = [f"{lab}{'' if ok else ' ' + FLAG}" for lab, (_, ok, _) in zip(labs, summaries)]
    lines += ["", "## Mean ± sd per run", "", "| Quantity | " + " | ".join(heads) + " |",
              "|---|" + "---|" * len(heads)]
    for n in names:
        lines.append(f"| `{n}` | " + " | ".join(_cell(cons.get(n), False) for cons, _, _ in summaries) + " |")
    lines += ["", "Mean and standard deviation of the draws after burn-in (importance-weighted for a "
              "surrogate-engine sample), as in each run's own summary."]
    if not all(ok for _, ok, _ in summaries):
        lines.append(f"{FLAG} this run misses its own stopping targets (see its `infer summarize`): its "
                     "numbers are not yet reliable.")
    lines += ["", "## Shift between runs", "",
              "| Runs (difference) | Significance of the shift | Gaussian approximation |", "|---|---|---|"]
    for s in shifts:
        r = s.result
        lines.append(f"| {s.a} − {s.b} | {_sigma_text(r)} | Q = {r.q:.2f} for {len(r.names)} dof, "
                     f"PTE = {r.pte:.3g}, {r.sigma_gauss:.2f}σ |")
    lines += ["", f"Quantities: {', '.join(f'`{n}`' for n in shifts[0].result.names)}. Significance: the "
              "probability mass of the parameter-difference posterior above its density at zero difference, "
              f"as an equivalent number of Gaussian standard deviations (Raveri & Hu 2019, PRD 99, 043506), "
              f"from {shifts[0].result.pairs:,} random pairs of draws; the kernel density estimate makes it "
              "slightly conservative. Gaussian: Q = Δμᵀ(C₁ + C₂)⁻¹Δμ and its χ² probability.",
              f"Caveat: {CAVEAT}."]
    same = [f"{s.a} − {s.b}" for s in shifts if s.same_data]
    if same:
        lines.append(f"Same data in {', '.join(same)}: these runs differ only by Monte Carlo noise and sampler "
                     "settings, so the shift is a consistency check of the sampling, not a tension.")
    if any(s.result.lower_bound for s in shifts):
        lines.append("“>”: zero difference lies beyond every difference draw; only a lower bound follows.")
    lines += ["", "## Bayes factors", "", "| Runs | ln B | Kass & Raftery scale |", "|---|---|---|"]
    for f in factors:
        if math.isfinite(f.ln_b):
            fav = f.a if f.ln_b > 0 else f.b
            lines.append(f"| {f.a} over {f.b} | {f.ln_b:.2f} ± {f.error:.2f} | {evidence_words(f.ln_b)}, "
                         f"favouring {fav} |")
        else:
            lines.append(f"| {f.a} over {f.b} | — | {f.reason} |")
    lines += ["", "ln B = ln Z₁ − ln Z₂ from the surrogate engine's importance-sampling evidence estimates, "
              "with their errors added in quadrature. It depends on the priors' volumes; only runs on the same "
              "data are compared."]
    return "\n".join(lines) + "\n"


def _tex(s: str) -> str:
    return s.replace("\\", r"\textbackslash{}").replace("_", r"\_").replace("%", r"\%").replace("&", r"\&")


def latex(labs, summaries, names, shifts, factors) -> str:
    from infer.report.tables import _ascii
    out = ["% infer compare: mean +/- sd per run (draws after burn-in; importance-weighted for a",
           "% surrogate-engine sample). Runs: " + _ascii("; ".join(labs))]
    for s in shifts:
        r = s.result
        out.append(_ascii(f"% shift {s.a} - {s.b} on {', '.join(r.names)}: {_sigma_text(r)}; Gaussian "
                          f"Q = {r.q:.2f}, PTE = {r.pte:.3g}" + (" (same data)" if s.same_data else "")))
    for f in factors:
        out.append(_ascii(f"% ln B({f.a} / {f.b}) = {f.ln_b:.2f} +/- {f.error:.2f}" if math.isfinite(f.ln_b)
                          else f"% ln B({f.a} / {f.b}): {f.reason}"))
    out += [r"\begin{tabular}{l" + "c" * len(labs) + "}", r"\hline",
            "Quantity & " + " & ".join(_tex(lab) for lab in labs) + r" \\", r"\hline"]
    for n in names:
        first = next(cons[n] for cons, _, _ in summaries if n in cons)
        label = f"${first.tex}$" if first.tex else _tex(n)
        out.append(label + " & " + " & ".join(_cell(cons.get(n), True) for cons, _, _ in summaries) + r" \\")
    out += [r"\hline", r"\end{tabular}"]
    return "\n".join(out) + "\n"
