"""``infer figure CHAIN --params a,b --labels … --width single|double --format pdf|png --out FILE``: a triangle
(or one marginal) of chosen parameters at a journal's column width (`infer.report.figures.paper`)."""
from __future__ import annotations

from infer.errors import EXIT_OK, UserError

MPI = False


def register(sub):
    from infer.commands import integer
    f = sub.add_parser("figure", help="a paper figure (triangle or marginal) of chosen parameters at column width")
    f.add_argument("chain", help="chain file of either engine")
    f.add_argument("--params", required=True, help="comma-separated parameter (or derived) names, in order")
    f.add_argument("--labels", help="comma-separated mathtext labels, one per parameter (default: the run's tex)")
    f.add_argument("--width", choices=("single", "double"), default="single",
                   help="single column (3.4 in) or double column (7.0 in)")
    f.add_argument("--format", choices=("pdf", "png"), help="file format (default: from --out)")
    f.add_argument("--out", required=True, help="output file (.pdf or .png)")
    f.add_argument("--burn", type=integer(0, "steps to discard"),
                   help="steps to discard (ensemble chains; default: automatic from τ)")
    f.add_argument("--replace", action="store_true", help="overwrite an existing output file")
    f.set_defaults(func=run)


def run(args) -> int:
    from infer.report.figures import paper
    names = [n for n in paper.split_list(args.params)]
    if not names or any(not n for n in names):
        raise UserError(f"--params: empty parameter name in {args.params!r}")
    if len(set(names)) != len(names):
        raise UserError(f"--params: a parameter is named twice in {args.params!r}")
    labels = paper.split_list(args.labels) if args.labels is not None else None
    if labels is not None and len(labels) != len(names):
        raise UserError(f"--labels: {len(labels)} label(s) for {len(names)} parameter(s)")
    out, fmt = paper.check_output(args.out, args.format, args.replace)
    sample, _cfg, what = paper.chain_draws(args.chain, args.burn)
    known = list(sample.names) + list(sample.derived_names)
    unknown = [n for n in names if n not in known]
    if unknown:
        raise UserError(f"{args.chain}: no parameter {unknown[0]!r}; the chain has {', '.join(known)}")
    if labels is None:
        labels = [sample.label(n) for n in names]
    labels = [paper.mathtext_label(t, "--labels" if args.labels is not None else args.chain) for t in labels]
    fig = paper.paper_figure(sample, names, labels, args.width)
    path = paper.write(fig, out, fmt, args.width)
    print(f"wrote {path}: {', '.join(names)} from {what}; {paper.WIDTHS[args.width]:g} in wide ({args.width} column)")
    return EXIT_OK
