"""``infer forecast SPEC --config RUN.toml``: the Fisher forecast of a run for an invented experiment.

Prints the marginalised and conditional Fisher σ of every sampled parameter and their correlations,
labelled as the Gaussian approximation at the fiducial point, and writes ``forecast.md`` (the table),
``forecast.json`` (the numbers) and ``ellipses.png`` (68.3 %/95.4 % ellipses of every pair) into the
output folder. ``--against CHAIN`` adds the ratio of each Fisher σ to the posterior sd of a sampled run.
The science is `infer.forecast.forecast`; the figure `infer.report.figures.ellipses`.
"""
from __future__ import annotations

import json
import os
from pathlib import Path

from infer.commands import integer
from infer.errors import EXIT_OK, UserError

#: The command evaluates on the MPI ranks when launched under MPI.
MPI = True
#: Files written into the output folder.
FILES = {"markdown": "forecast.md", "json": "forecast.json", "figure": "ellipses.png"}


def _rtol(text):
    import argparse
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not 0 < v < 1:
        raise argparse.ArgumentTypeError(f"must lie in (0, 1), got {text}")
    return v


def register(sub) -> None:
    f = sub.add_parser("forecast", help="Fisher forecast of a run's errors for an experiment spec "
                                        "(Gaussian approximation at the fiducial)")
    f.add_argument("spec", help="experiment spec (TOML, see configs/kestrel.toml)")
    f.add_argument("--config", required=True, help="run file: theory, parameters, priors, [dataset] cuts")
    f.add_argument("--out", help="output folder (default: beside the run's summary, NAME-forecast)")
    f.add_argument("--replace", action="store_true", help="overwrite an earlier forecast in the output folder")
    f.add_argument("--against", metavar="CHAIN", help="chain file of a sampled run: print Fisher σ / posterior sd")
    f.add_argument("--burn", type=integer(0, "steps to discard"),
                   help="with --against, steps of an ensemble chain to discard (default: automatic from τ)")
    f.add_argument("--workers", type=integer(0, "worker processes"),
                   help="worker processes for the exact calls (default: [sampling] workers)")
    f.add_argument("--rtol", type=_rtol, default=1e-2,
                   help="step check: successive derivatives agree to this, in noise units (default 0.01)")
    f.add_argument("--halvings", type=integer(1, "step halvings"), default=6,
                   help="step check: halvings of each first step at most (default 6)")
    f.set_defaults(func=cmd_forecast)


def check_output(folder: Path, replace: bool) -> Path:
    """The output folder can take the files; an earlier forecast is replaced only with ``replace`` and
    only when its forecast.json is ours; nothing else is ever overwritten."""
    from infer import paths
    folder = folder.expanduser().resolve()
    if os.path.lexists(folder) and not folder.is_dir():
        raise UserError(f"{folder}: output path exists and is not a folder")
    paths.output_folder(folder, "forecast folder")
    present = [folder / n for n in FILES.values() if os.path.lexists(folder / n)]
    if present and not replace:
        raise UserError(f"{present[0]} already exists (pass --replace to overwrite an earlier forecast)")
    if present:
        from infer.forecast.forecast import FORMAT
        js = folder / FILES["json"]
        try:
            ours = js.is_file() and not js.is_symlink() and json.loads(js.read_text("utf-8")).get("format") == FORMAT
        except (OSError, ValueError, AttributeError):
            ours = False
        if not ours or any(p.is_symlink() or not p.is_file() for p in present):
            raise UserError(f"{folder}: holds files that are not an earlier infer forecast; --replace leaves "
                            "them alone (choose another --out)")
    return folder


def cmd_forecast(args) -> int:
    from infer import config, paths
    from infer.atomic import write_atomic, write_text_atomic
    from infer.forecast import forecast as fc
    from infer.forecast import report
    from infer.parallel import cap_in_process_threads
    from infer.report.figures.ellipses import ellipses
    if not Path(args.spec).is_file():
        raise UserError(f"{args.spec}: no such experiment spec")
    cfg = config.load(args.config)
    setup = fc.prepare(args.spec, cfg)
    if args.against is not None:
        if not Path(args.against).is_file():
            raise UserError(f"{args.against}: no such chain file")
        paths.readable(args.against, "chain file")
    elif args.burn is not None:
        raise UserError("--burn needs --against CHAIN")
    out = check_output(Path(args.out) if args.out else Path(cfg.summary_dir + "-forecast"), args.replace)
    # The chain is read before the first theory call, so a bad chain costs nothing.
    against = report.posterior_constraints(args.against, args.burn) if args.against else None
    if against is not None and not any(p.name in against[0] for p in cfg.sampled):
        raise UserError(f"{args.against}: holds none of the run's sampled parameters "
                        f"({', '.join(p.name for p in cfg.sampled)})")
    workers = cfg.sampling.workers if args.workers is None else args.workers
    cap_in_process_threads(workers, cfg.sampling.threads_per_worker)
    result = fc.forecast(setup, workers=workers, rtol=args.rtol, max_halvings=args.halvings)
    cmp = report.compare(result, against) if against is not None else None
    print(report.text_table(result, cmp))
    out.mkdir(parents=True, exist_ok=True)
    write_text_atomic(out / FILES["json"], json.dumps(result.to_dict() | (
        {"against": report.comparison_dict(cmp)} if cmp else {}), indent=1))
    write_text_atomic(out / FILES["markdown"], report.markdown(result, cmp))
    overlay = against[2] if cmp is not None and not cmp.missing else None
    title = f"{fc.LABEL}: {result.experiment}" + (f"; outlines: the sampled posterior of {Path(args.against).name}"
                                                  if overlay is not None else "")
    write_atomic(out / FILES["figure"], lambda tmp: ellipses(result.names, result.x0, result.covariance, tmp,
                                                             tex=result.tex, title=title,
                                                             sample=overlay))
    for name in FILES.values():
        print(f"  wrote {out / name}")
    return EXIT_OK
