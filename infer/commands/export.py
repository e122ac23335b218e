"""``infer export CHAIN OUT``: a chain's draws as ArviZ InferenceData (``.nc``) or a plain table
(``.csv``, ``.txt``); the work is `infer.report.export.export_file`."""
from __future__ import annotations

from infer.commands import integer


def register(sub) -> None:
    e = sub.add_parser("export", help="a chain's draws as ArviZ NetCDF (.nc) or a plain table (.csv, .txt)")
    e.add_argument("chain", help="chain file of either engine")
    e.add_argument("out", help="file to write; its suffix chooses the kind: .nc, .csv or .txt")
    e.add_argument("--burn", type=integer(0, "steps to discard"),
                   help="steps to discard (default: automatic from τ, as the summary)")
    e.add_argument("--thin", type=integer(1, "keep every k-th step"), default=1,
                   help="keep every k-th step after burn-in (default 1)")
    e.add_argument("--replace", action="store_true", help="overwrite an earlier export at OUT")
    e.set_defaults(func=run)


def run(args) -> int:
    from infer.report.export import export_file
    print(export_file(args.chain, args.out, args.burn, args.thin, args.replace))
    return 0
