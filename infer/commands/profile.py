"""``infer profile CONFIG PARAM [--points N] [--range LO HI] [--chain CHAIN] --out DIR``: the profile likelihood
of one parameter (`infer.fit.profile`), its Δχ² = 1 and 3.84 intervals, a table, a record and a figure
beside the chain's marginal posterior (`infer.report.figures.profile`)."""
from __future__ import annotations

from infer.errors import EXIT_OK, UserError

MPI = True


def register(sub):
    from infer.commands import integer
    p = sub.add_parser("profile", help="profile likelihood of one parameter on a grid, with Δχ² intervals")
    p.add_argument("config")
    p.add_argument("param", help="the sampled parameter to profile")
    p.add_argument("--points", type=integer(3, "grid points"), default=21, help="grid points (default 21)")
    p.add_argument("--range", nargs=2, type=float, metavar=("LO", "HI"),
                   help="grid range (default: best fit ± 3 Laplace σ, cut at the prior support)")
    p.add_argument("--chain", help="a chain of this run: its marginal is drawn beside the profile; a "
                                   "surrogate-engine chain also lends its surrogate for the proposals")
    p.add_argument("--burn", type=integer(0, "steps to discard"), help="burn-in of an ensemble --chain")
    p.add_argument("--surrogate", choices=("auto", "train", "off"), default="auto",
                   help="proposals: auto = the surrogate of a surrogate-engine --chain if given, else exact "
                        "fits only; train = train one on a design of exact calls first; off = exact fits only")
    p.add_argument("--with-priors", action="store_true",
                   help="keep Gaussian priors as χ² penalties (profile of −2 ln p); default: priors as bounds only")
    p.add_argument("--out", help="output folder (default: the run's summary folder)")
    p.add_argument("--workers", type=integer(0, "worker processes"),
                   help="worker processes for the exact calls (default: [sampling] workers)")
    p.add_argument("--replace", action="store_true", help="overwrite an earlier profile of this parameter")
    p.set_defaults(func=run)


def run(args) -> int:
    from infer import config
    from infer.fit import profile as prof
    from infer.report import profile_record as profrec
    from infer.parallel import cap_in_process_threads
    cfg = config.load(args.config)
    prof.check_request(cfg, args.param, args.points, args.range)
    out = profrec.check_outputs(args.out or cfg.summary_dir, args.param, args.replace)
    sample = chain_kind = None
    if args.chain:
        sample, chain_kind = _chain(cfg, args)
    surrogate = None
    if args.surrogate == "train":
        surrogate = prof.train_surrogate()
    elif args.surrogate == "auto" and chain_kind == "surrogate":
        surrogate = _lend(prof, cfg, args.chain)
    workers = cfg.sampling.workers if args.workers is None else args.workers
    cap_in_process_threads(workers, cfg.sampling.threads_per_worker)
    result = prof.profile(cfg, args.param, points=args.points, span=args.range,
                          mode="posterior" if args.with_priors else "likelihood", workers=workers,
                          surrogate=surrogate)
    marginal = _marginal_rows(sample, args.param) if sample is not None else None
    from infer.atomic import write_atomic, write_text_atomic
    from infer.report.figures.profile import profile_plot
    from infer.report.figures.paper import mathtext_label
    tex = next(p.tex for p in cfg.sampled if p.name == args.param)
    try:
        label = mathtext_label(tex, cfg.path) if tex else args.param
    except UserError:
        label = args.param
    write_atomic(out["figure"], lambda tmp: profile_plot(result, tmp, sample, label))
    text = profrec.table(result, marginal)
    write_text_atomic(out["table"], text)
    digests = {k: profrec._sha256(out[k]) for k in ("table", "figure")}
    profrec.write_record(result, out["record"], digests, {"config": cfg.path, "name": cfg.name,
                                                       "dataset": cfg.dataset["file"], "chain": args.chain})
    iv = result.intervals()
    print(f"profile of {args.param}: Δχ² ≤ 1 {iv[0].text('.6g')}, Δχ² ≤ 3.84 {iv[1].text('.6g')}; "
          f"{result.total_calls} exact calls in {result.seconds:.1f} s")
    for n in result.notes:
        print(f"note: {n}")
    for k in ("table", "figure", "record"):
        print(f"  {k:<7} {out[k]}")
    return EXIT_OK


def _lend(prof, cfg, chain):
    """The surrogate of a surrogate-engine chain, or exact fits only (with a warning) when it cannot be rebuilt."""
    import logging

    def make(model, evaluator, best):
        try:
            return prof.surrogate_from_chain(cfg, chain, model)
        except (UserError, ValueError) as err:
            logging.getLogger("infer").warning("profile: no surrogate proposals (%s); exact fits only", err)
            return None
    return make


def _chain(cfg, args):
    """The chain's draws, checked against the run file before any theory call."""
    from infer.config import diff
    from infer.report.figures.paper import chain_draws
    from infer.store.enginefile import engine_of
    sample, stored, _ = chain_draws(args.chain, args.burn)
    refused, _ = diff(stored, cfg)
    if refused:
        raise UserError(f"{args.chain}: was run with another posterior than {cfg.path} ({refused[0]})")
    if args.param not in sample.names:
        raise UserError(f"{args.chain}: has no sampled parameter {args.param!r}")
    return sample, ("surrogate" if engine_of(args.chain) == "surrogate" else "ensemble")


def _marginal_rows(sample, name) -> dict:
    """The chain's marginal of ``name`` for the table: median and 68 % / 95 % equal-tailed intervals."""
    from infer.analysis.marginals import quantile
    from infer.report.figures.paper import columns_of
    cols, w = columns_of(sample, [name])
    q = quantile(cols[0], [0.025, 0.16, 0.5, 0.84, 0.975], w)
    return {"marginal posterior median (chain)": f"{q[2]:.6g}",
            "marginal 68 % equal-tailed interval (chain)": f"[{q[1]:.6g}, {q[3]:.6g}]",
            "marginal 95 % equal-tailed interval (chain)": f"[{q[0]:.6g}, {q[4]:.6g}]"}

