"""The ``infer`` command: parses arguments, checks the user's paths, calls the library and prints.

No science lives here: the posterior and its labels (`infer.model.posterior`), the provenance record
(`infer.model.provenance`), the timing check (`infer.model.timing`), the theory of a fixed point
(`infer.theory.theory_at_point`) and the evaluators (`infer.parallel.make_evaluator`) are library
functions the tests call too.

Every user error ends in one line ``infer: error: …`` and exit status 2 (no traceback unless ``--debug``),
command-line parsing errors included (``… (see infer COMMAND --help)``, no usage block); every output
location is checked before the first theory call. A run stopped by a signal or its wall-time budget exits
75 after writing its checkpoint; output cut short by a closed pipe (``infer status … | head -1``) ends
quietly with 141 (128 + SIGPIPE, what a shell reports for a program stopped by a closed pipe).
"""
from __future__ import annotations

import argparse
import importlib
import json
import logging
import os
import sys
import time
from pathlib import Path

# One BLAS thread in the driver process (set before NumPy loads; a user's value wins): no oversubscription
# beside the workers, and surrogate-engine results independent of the core count (DEVELOPERS.md).
for _var in ("OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402

from infer import __version__, paths  # noqa: E402
from infer.errors import EXIT_INTERNAL, EXIT_OK, EXIT_PIPE, EXIT_USAGE, UserError  # noqa: E402

log = logging.getLogger("infer")

#: The commands that use the evaluating MPI ranks; every other command runs on rank 0 alone.
MPI_COMMANDS = ("run", "resume", "fit")
#: Commands defined in their own modules: ``infer.commands.NAME`` has ``register(sub)``, which adds its
#: sub-parser (with ``set_defaults(func=...)``), and ``MPI = True`` if it uses the evaluating ranks. Every
#: module of the folder is a command (found by name, never imported until the parser is built).
def _command_modules() -> tuple[str, ...]:
    import pkgutil
    import infer.commands
    return tuple(sorted(m.name for m in pkgutil.iter_modules(infer.commands.__path__) if not m.name.startswith("_")))


COMMAND_MODULES: tuple[str, ...] = _command_modules()


# -- helpers ---------------------------------------------------------------------------------------------
def _override(cfg, args):
    """Apply command-line overrides of run-control settings (never of the posterior)."""
    from dataclasses import replace
    from infer.config import parse_duration
    sampling, stopping = cfg.sampling, cfg.stopping
    if getattr(args, "workers", None) is not None:
        if args.workers < 0:
            raise UserError(f"--workers must be >= 0, got {args.workers}")
        sampling = replace(sampling, workers=args.workers)
    if getattr(args, "steps", None) is not None:
        if args.steps < 1:
            raise UserError(f"--steps must be >= 1, got {args.steps}")
        sampling = replace(sampling, steps=args.steps)
    if getattr(args, "time_limit", None) is not None:          # an empty value is an error, not "no limit"
        stopping = replace(stopping, time_limit=parse_duration(args.time_limit))
    return replace(cfg, sampling=sampling, stopping=stopping)


# -- commands --------------------------------------------------------------------------------------------
def cmd_run(args) -> int:
    from infer import config
    from infer.run import cap_threads, check_can_set_aside, start
    from infer.sampling.driver import process_age
    clock = time.monotonic() - process_age()       # the wall-time budget counts from process start
    cfg = _override(config.load(args.config), args)
    if args.chain:
        cfg = _replace_paths(cfg, args.chain)
    chain = Path(cfg.chain_path)
    paths.file_folder(chain)
    if chain.exists() and args.replace:
        check_can_set_aside(chain)
    if args.summarize:
        paths.output_folder(cfg.summary_dir, "summary folder")
    cap_threads(cfg)
    return _maybe_summarize(args, chain, start(cfg, chain, args.replace, clock))


def _maybe_summarize(args, chain, code):
    if args.summarize and code == EXIT_OK:
        summarize_chain(chain)
    return code


def _replace_paths(cfg, chain):
    from dataclasses import replace
    p = Path(chain).resolve()
    if p.suffix != ".h5":
        raise UserError(f"--chain must end in .h5, got {chain}")
    return replace(cfg, chain_path=str(p), summary_dir=str(p.with_suffix("")))


def cmd_resume(args) -> int:
    from infer.run import resume
    from infer.sampling.driver import process_age
    clock = time.monotonic() - process_age()       # the wall-time budget counts from process start
    chain = Path(args.chain).resolve()
    if not chain.exists():
        raise UserError(f"{args.chain}: no such chain file")
    paths.readable(chain, "chain file")
    changes = [f"--{flag.replace('_', '-')} {val}" for flag, val in
               (("steps", args.steps), ("workers", args.workers), ("time_limit", args.time_limit)) if val is not None]
    check = (lambda cfg: paths.output_folder(cfg.summary_dir, "summary folder")) if args.summarize else None
    code = resume(chain, args.config, lambda cfg: _override(cfg, args), changes, clock, check)
    return _maybe_summarize(args, chain, code)


def cmd_status(args) -> int:
    from infer.report.status import status_of_file
    print(status_of_file(args.chain, params=args.params))
    return EXIT_OK


def cmd_summarize(args) -> int:
    return summarize_chain(args.chain, args.out, args.burn, args.no_model)


def summarize_chain(chain, out=None, burn=None, no_model=False) -> int:
    from infer.report.summary import summarize_file
    print(summarize_file(str(chain), out, burn, no_model))
    return EXIT_OK


def cmd_simulate(args) -> int:
    from infer import data as datasets
    from infer import forecast as mock
    from infer.forecast import multifreq
    from infer.theory import theory_at_point
    if multifreq.is_multifrequency(args.spec):
        spec = multifreq.read_spec(args.spec)
        exp_name, ell_max, fiducial, options = spec.name, spec.ell_max, spec.fiducial, dict(spec.mock,
                                                                                          theory=spec.theory)
    else:
        exp, fiducial, options = mock.read_experiment(args.spec)
        exp_name, ell_max = exp.name, exp.ell_max
    if args.out is None and options.get("output") is None:
        raise UserError(f"{args.spec}: no output file: give OUT on the command line or [mock] output")
    out = Path(args.out if args.out is not None else options["output"]).resolve()
    if out.exists() and not args.replace:
        raise UserError(f"{out} already exists (pass --replace to overwrite it)")
    if out.exists():
        if out.suffix.lower() in datasets.SACC_SUFFIXES:
            datasets.saccwrite.replaceable(out)
        else:
            from infer.data.hdf5 import FORMAT
            paths.replaceable(out, FORMAT, "dataset", "overwrites")
    paths.file_folder(out)
    datasets.check_target(out, overwrite=args.replace)
    theory, inputs = theory_at_point(options["theory"], fiducial, ell_max + 2, where=f"{args.spec}: [theory]",
                                     point_where=f"{args.spec}: [fiducial]")
    if multifreq.is_multifrequency(args.spec):
        multifreq.check_sky(spec)                   # every [sky] name known, before the theory call
    spectra = theory.compute(inputs)
    seed = args.seed if args.seed is not None else options.get("seed")
    realise = options.get("realise", True) and not args.no_noise
    if multifreq.is_multifrequency(args.spec):
        bp = multifreq.simulate(spec, spectra, seed=seed, realise=realise)
    else:
        bp = mock.simulate(exp, spectra, seed=seed, realise=realise)
    desc = options.get("description") or f"Mock band powers of the fictional experiment '{exp_name}'"
    desc += (f" [made by `infer simulate {Path(args.spec).name}`; fiducial {json.dumps(fiducial)}; "
             f"theory {json.dumps(theory.describe(), default=str)}; noise realisation: "
             f"{'seed ' + str(seed) if realise else 'none'}]")
    datasets.write(bp, str(out), overwrite=args.replace, description=desc)
    print(f"wrote {out}: {len(bp.value)} bands ({'/'.join(bp.spectra)}), ℓ {int(bp.ell_lo.min())}–"
          f"{int(bp.ell_hi.max())}, experiment '{exp_name}'" +
          (f", channels {', '.join(c.name for c in bp.channels)}" if len(bp.channels) > 1 else ""))
    return EXIT_OK


def cmd_check(args) -> int:
    from infer import config
    from infer.model.posterior import Posterior
    from infer.model.timing import time_posterior
    cfg = config.load(args.config)
    if args.presets:                        # checked before the first theory call
        from infer.model.accuracy import check_request
        check_request(cfg, args.preset_points, args.preset_reference)
    t = time.perf_counter()
    post = Posterior(cfg)
    setup = time.perf_counter() - t
    x = np.array([p.guess for p in cfg.sampled])
    print(f"run file   {cfg.path}: valid; {len(post.names)} sampled ({', '.join(post.names)}), "
          f"{len(cfg.fixed)} fixed")
    print(f"dataset    {cfg.dataset['file']}: {post.like.n} bands ({'/'.join(post.like.kinds)}), "
          f"ℓ ≤ {post.data.ell_max_needed}, experiment '{post.data.experiment}'")
    print(f"set-up     {setup:.2f} s (dataset, theory, Cholesky factor)")
    lp, blob, reason = post(x)
    if reason:
        raise UserError(f"{cfg.path}: the posterior at the guesses is -inf ({reason}); fix 'guess' values")
    print(f"at guess   ln p = {lp:.2f}, χ² = {blob[-1]:.1f} for {post.like.n} bands")
    t = time_posterior(post, x, args.calls)
    print(f"theory     {t['theory_s']:.3f} s per call (median of {t['calls']}, threads {t['threads']})")
    print(f"likelihood {t['likelihood_s'] * 1e3:.3f} ms per call = {100 * t['fraction']:.3f} % of a theory call "
          "(goal ≤ 1 %)")
    if args.presets:
        from infer.model.accuracy import preset_check
        result = preset_check(cfg, points=args.preset_points, reference=args.preset_reference, post=post)
        print("\n".join(result.lines()))
    return EXIT_OK


def cmd_salvage(args) -> int:
    from infer.store.salvage import salvage
    steps, exact = salvage(args.damaged, args.out)
    print(f"wrote {args.out}: {steps} intact steps recovered from {args.damaged} (left unchanged); "
          + ("it resumes exactly" if exact else "its random state was re-seeded, so a resume continues "
             "correctly but not bit-identically to the lost run"))
    return EXIT_OK


def cmd_fit(args) -> int:
    from infer import config
    from infer.fit import bestfit
    from infer.parallel import cap_in_process_threads
    mode = "likelihood" if args.likelihood else "posterior"
    cfg = config.load(args.config)
    out = bestfit.check_output(args.out or bestfit.default_path(cfg, mode), args.replace)
    workers = cfg.sampling.workers if args.workers is None else args.workers
    cap_in_process_threads(workers, cfg.sampling.threads_per_worker)
    result = bestfit.fit(cfg, starts=args.starts, mode=mode, workers=workers)
    path = bestfit.write(result, out, overwrite=args.replace)
    print(bestfit.table(result))
    print(f"wrote {path}")
    return EXIT_OK


# -- entry point -----------------------------------------------------------------------------------------
class UsageError(UserError):
    """A command-line parsing error (one line, exit 2)."""


class Parser(argparse.ArgumentParser):
    """argparse with every error as one line ``infer: error: …  (see infer COMMAND --help)`` and exit 2,
    never a usage block: the error is raised as `UsageError` and printed by `main` like any user error."""

    def error(self, message):
        raise UsageError(f"{message}  (see {self.prog} --help)")


def _integer(low: int, what: str):
    """An argparse type: an integer >= ``low``."""
    def parse(text):
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be an integer ({what}), got {text!r}") from None
        if value < low:
            raise argparse.ArgumentTypeError(f"must be >= {low} ({what}), got {value}")
        return value
    parse.__name__ = "integer"
    return parse


def _duration(text):
    """An argparse type: a wall-time budget (checked as the run file's time_limit is); kept as text."""
    from infer.config import parse_duration
    try:
        parse_duration(text, where="--time-limit")
    except UserError as err:
        raise argparse.ArgumentTypeError(str(err).removeprefix("--time-limit: ")) from None
    return text


def build_parser() -> argparse.ArgumentParser:
    p = Parser(prog="infer", description="Cosmological parameters from CMB band powers.")
    p.add_argument("--version", action="version", version=f"infer {__version__}")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug messages")
    p.add_argument("--quiet", action="store_true", help="only warnings and errors")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    r = sub.add_parser("run", help="start a new chain from a run file")
    r.add_argument("config")
    r.add_argument("--chain", help="chain file to write (default: [output] chain, or chains/NAME.h5)")
    r.add_argument("--replace", action="store_true", help="set an existing chain file aside (renamed) and start anew")
    r.set_defaults(func=cmd_run)

    u = sub.add_parser("resume", help="continue a chain to a requested length")
    u.add_argument("chain")
    u.add_argument("--config", help="a run file whose run-control settings replace the stored ones")
    u.set_defaults(func=cmd_resume)
    for sp in (r, u):
        sp.add_argument("--steps", type=_integer(1, "total steps"),
                        help="total length to reach (overrides [sampling] steps)")
        sp.add_argument("--workers", type=_integer(0, "worker processes"),
                        help="worker processes for the posterior (0: in this process)")
        sp.add_argument("--time-limit", type=_duration,
                        help="wall-time budget, e.g. 47:30:00; stops cleanly before it")
        sp.add_argument("--summarize", action="store_true",
                        help="when the run ends (not when paused), write the summary tables and figures")

    s = sub.add_parser("status", help="progress and convergence figures of a chain (also while it runs)")
    s.add_argument("chain")
    s.add_argument("--params", action="store_true", help="per-quantity R̂, ESS and τ")
    s.set_defaults(func=cmd_status)

    m = sub.add_parser("summarize", help="constraints tables and figures")
    m.add_argument("chain")
    m.add_argument("--out", help="output folder (default: beside the chain, named after it)")
    m.add_argument("--burn", type=_integer(0, "steps to discard"), help="steps to discard (default: automatic from τ)")
    m.add_argument("--no-model", action="store_true", help="skip the theory call for the data-vs-model figure")
    m.set_defaults(func=cmd_summarize)

    g = sub.add_parser("simulate", help="mock band powers for an invented experiment")
    g.add_argument("spec", help="experiment spec (TOML, see configs/kestrel.toml)")
    g.add_argument("out", nargs="?", help="dataset file to write (.h5; default: [mock] output of the spec)")
    g.add_argument("--seed", type=_integer(0, "seed"), help="seed of the noise realisation")
    g.add_argument("--no-noise", action="store_true", help="band powers equal to the binned fiducial theory")
    g.add_argument("--replace", action="store_true", help="overwrite an existing output file")
    g.set_defaults(func=cmd_simulate)

    c = sub.add_parser("check", help="validate a run file and time the theory and likelihood")
    c.add_argument("config")
    c.add_argument("--calls", type=_integer(1, "theory calls to time"), default=3, help="theory calls to time")
    c.add_argument("--presets", action="store_true",
                   help="also compare the run's accuracy preset with a reference preset: Δχ² at the guess and "
                        "Sobol points around it, 2 theory calls per point (infer.model.accuracy)")
    c.add_argument("--preset-reference", default="high", metavar="PRESET",
                   help="reference preset of --presets (default: high)")
    c.add_argument("--preset-points", type=_integer(1, "points of the preset check"), default=3,
                   help="points of --presets, the guess included (default 3)")
    c.set_defaults(func=cmd_check)

    v = sub.add_parser("salvage", help="copy the intact part of a damaged chain into a new file")
    v.add_argument("damaged")
    v.add_argument("out")
    v.set_defaults(func=cmd_salvage)

    f = sub.add_parser("fit", help="best fit (MAP, or MLE with --likelihood), Laplace covariance, χ² and PTE")
    f.add_argument("config")
    f.add_argument("--starts", type=_integer(1, "starting points"), default=3,
                   help="starting points: the guesses plus draws from the starting ball (default 3)")
    f.add_argument("--likelihood", action="store_true", help="maximise the likelihood (priors kept as bounds only)")
    f.add_argument("--out", help="result file (.json; default: beside the chain, e.g. NAME.peak-posterior.json)")
    f.add_argument("--replace", action="store_true", help="overwrite an earlier fit result")
    f.add_argument("--workers", type=_integer(0, "worker processes"),
                   help="worker processes for the exact calls (default: [sampling] workers)")
    f.set_defaults(func=cmd_fit)
    for name in COMMAND_MODULES:
        importlib.import_module(f"infer.commands.{name}").register(sub)
    return p


def _uses_ranks(command: str) -> bool:
    """Whether ``command`` uses the evaluating MPI ranks."""
    return command in MPI_COMMANDS or (command in COMMAND_MODULES and
                                       getattr(importlib.import_module(f"infer.commands.{command}"), "MPI", False))


def _setup_logging(debug: bool, quiet: bool):
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("infer: %(message)s" if not debug else
                                           "infer %(asctime)s %(levelname)s: %(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(logging.DEBUG if debug else logging.WARNING if quiet else logging.INFO)
    log.propagate = False


def _stdout_closed() -> int:
    """The reader of our standard output has gone (``| head``): stop quietly. Later writes (and the flush
    at exit) go to /dev/null, so no second error is printed."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError):
        pass
    return EXIT_PIPE


def _error(message: str) -> int:
    try:
        print(f"infer: error: {message}", file=sys.stderr)
    except (BrokenPipeError, OSError):
        pass
    return EXIT_USAGE


def main(argv=None) -> int:
    parser = build_parser()
    from infer.parallel import mpi
    try:
        args = parser.parse_args(argv)
    except UserError as err:
        return _error(str(err)) if mpi.is_root() else EXIT_USAGE     # one line, not one per MPI rank
    _setup_logging(args.debug, args.quiet)
    parallel = mpi.world_size() > 1
    if parallel and not mpi.is_root():
        # evaluates for rank 0 in run/resume; every other command runs on rank 0 only
        return mpi.serve() if _uses_ranks(args.command) else EXIT_OK
    try:
        if parallel and _uses_ranks(args.command):
            mpi.start()
        for name in ("chain", "damaged"):
            if isinstance(getattr(args, name, None), str):
                paths.readable(getattr(args, name), "chain file")
        code = args.func(args)
        sys.stdout.flush()                   # a closed pipe shows here, not at exit
        return code
    except BrokenPipeError:
        return _stdout_closed()
    except UserError as err:
        if args.debug:
            raise
        return _error(str(err))
    except KeyboardInterrupt:
        print("infer: interrupted", file=sys.stderr)
        return 130
    except Exception as err:  # noqa: BLE001 - the last line of defence
        if args.debug:
            raise
        print(f"infer: internal error: {err.__class__.__name__}: {err} (rerun with --debug for the traceback "
              "and please report it)", file=sys.stderr)
        return EXIT_INTERNAL
    finally:
        if parallel and _uses_ranks(args.command):
            mpi.shutdown()


if __name__ == "__main__":
    sys.exit(main())
