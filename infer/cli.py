"""The ``infer`` command: parses arguments and calls the modules; no science lives here.

Every user error ends in one line ``infer: error: …`` and exit status 2 (no traceback unless ``--debug``);
a run stopped by a signal or its wall-time budget exits 75 after writing its checkpoint.
"""
from __future__ import annotations

import argparse
import json
import logging
import os
import platform
import signal
import socket
import sys
import time
from pathlib import Path

import numpy as np

from infer import __version__
from infer.errors import EXIT_INTERNAL, EXIT_OK, EXIT_PAUSED, EXIT_USAGE, UserError

log = logging.getLogger("infer")


# -- helpers ---------------------------------------------------------------------------------------------
def _versions(theory_code: str) -> dict:
    import emcee
    import h5py
    import numpy
    import scipy
    out = {"infer": __version__, "python": platform.python_version(), "numpy": numpy.__version__,
           "scipy": scipy.__version__, "emcee": emcee.__version__, "h5py": h5py.__version__,
           "hdf5": h5py.version.hdf5_version}
    if theory_code == "camb":
        import camb
        out["camb"] = camb.__version__
    return out


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
    if getattr(args, "time_limit", None):
        stopping = replace(stopping, time_limit=parse_duration(args.time_limit))
    return replace(cfg, sampling=sampling, stopping=stopping)


def cap_threads(cfg):
    """Before the theory code is first loaded in this process: an in-process evaluation (workers = 0)
    uses the same OpenMP thread count as a worker process or an MPI rank would (`evaluate.threads_for`),
    so a chain is identical bit for bit however its points were computed."""
    from infer.parallel.evaluate import set_threads, threads_for
    if cfg.sampling.workers == 0:
        set_threads(threads_for(1, cfg.sampling.threads_per_worker))


def make_evaluator(cfg, posterior, early=None):
    from infer.parallel.evaluate import InProcess, ProcessPool, never
    from infer.parallel.mpi import world_size
    stop = early.is_set if early is not None else never
    if world_size() > 1:
        from infer.parallel.mpi import MPIEvaluator
        ev = MPIEvaluator(cfg, len(posterior.blob_names))
    elif cfg.sampling.workers == 0:
        ev = InProcess(posterior)
    else:
        ev = ProcessPool(cfg, cfg.sampling.workers, len(posterior.blob_names), cfg.sampling.threads_per_worker,
                         should_stop=stop)
    ev.should_stop = stop
    return ev


def _check_writable_dir(path: Path):
    d = path.parent
    try:
        d.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise UserError(f"{d}: cannot create the output folder ({err.strerror})") from None
    if not os.access(d, os.W_OK | os.X_OK):
        raise UserError(f"{d}: the output folder is not writable")


def _report(outcome, chain_path):
    v = outcome.verdict
    if outcome.code == EXIT_PAUSED:
        log.info("paused after %d steps (%s); checkpoint written to %s; continue with `infer resume %s`",
                 outcome.steps, outcome.reason, chain_path, chain_path)
    elif outcome.reason == "converged":
        log.info("converged after %d steps: every stopping target met (R̂max %.4f, ESS min %.0f)",
                 outcome.steps, v.rhat_max, min(v.ess_bulk_min, v.ess_tail_min))
    else:
        why = "; ".join(v.missing) if v is not None else "no convergence check was reached"
        log.info("reached the requested %d steps WITHOUT meeting the stopping targets (%s); the chain is "
                 "not converged — extend it with `infer resume %s --steps N`", outcome.steps, why, chain_path)


class _EarlySignals:
    """SIGTERM/SIGINT before the driver takes over (start-up, starting ball, worker start): remember the
    signal so that evaluators abandon their work and the command exits 75 like a paused run."""

    def __init__(self):
        self.signal: str | None = None

    def __enter__(self):
        self._old = {s: signal.signal(s, self._handler) for s in (signal.SIGTERM, signal.SIGINT)}
        return self

    def _handler(self, signum, frame):
        self.signal = signal.Signals(signum).name

    def is_set(self) -> bool:
        return self.signal is not None

    def __exit__(self, *exc):
        for s, h in self._old.items():
            signal.signal(s, h)


def _paused_before_start(early, what):
    log.info("stopped by %s %s; the chain is unchanged (exit 75: run the same command again)",
             early.signal or "a signal", what)
    return EXIT_PAUSED


def _drive(cfg, store, evaluator, state, start_event, clock, early):
    from infer.sampling.driver import Driver
    driver = Driver(cfg, store, evaluator, state)
    driver.stop_requested = early.signal           # a signal during start-up pauses at once
    outcome = driver.run(cfg.sampling.steps, cfg.stopping.time_limit, clock, start_event)
    _report(outcome, store.path)
    if driver.rejections:
        log.info("points given ln p = -inf, by reason: %s",
                 ", ".join(f"{k} {v}" for k, v in sorted(driver.rejections.items())))
    return outcome.code


# -- commands --------------------------------------------------------------------------------------------
def cmd_run(args) -> int:
    from infer import config
    from infer.store.lock import ChainLock
    from infer.model.posterior import Posterior
    from infer.sampling.driver import event, starting_ball
    from infer.store.chainfile import ChainStore
    from infer.parallel.evaluate import Interrupted
    from infer.sampling.driver import process_age
    clock = time.monotonic() - process_age()       # the wall-time budget counts from process start
    cfg = _override(config.load(args.config), args)
    if args.chain:
        cfg = _replace_paths(cfg, args.chain)
    chain = Path(cfg.chain_path)
    _check_writable_dir(chain)
    cap_threads(cfg)
    posterior = Posterior(cfg)                       # validates dataset, theory and parameters first
    with _EarlySignals() as early, ChainLock(str(chain)):
        store = ChainStore(str(chain))
        store.remove_strays()
        if chain.exists():
            if not args.replace:
                raise UserError(f"{chain} already exists: continue it with `infer resume {chain}`, or pass "
                                "--replace to set it aside (it is renamed, never deleted)")
            aside = chain.with_name(chain.name + time.strftime(".replaced-%Y%m%d-%H%M%S"))
            os.replace(chain, aside)
            log.info("set the existing chain aside as %s", aside)
        log.info("run '%s': %d sampled parameters, %d bands (%s), %d ensembles × %d walkers, up to %d steps",
                 cfg.name, len(posterior.names), posterior.like.n, "/".join(posterior.like.kinds),
                 cfg.sampling.ensembles, cfg.sampling.walkers, cfg.sampling.steps)
        evaluator = None
        try:
            evaluator = make_evaluator(cfg, posterior, early)
            start, rng = starting_ball(cfg, evaluator, len(posterior.blob_names))
        except Interrupted:
            if evaluator is not None:
                evaluator.close()
            return _paused_before_start(early, "before the first checkpoint (no chain file was written)")
        except BaseException:
            if evaluator is not None:
                evaluator.close()
            raise
        provenance = {
            "config_text": cfg.text, "config_path": cfg.path, "run_name": cfg.name, "seed": cfg.seed,
            "dataset_file": cfg.dataset["file"], "dataset_sha256": posterior.data.sha256,
            "experiment": posterior.data.experiment, "model": json.dumps(posterior.describe(), default=str),
            "versions": json.dumps(_versions(cfg.theory["code"])), "host": socket.gethostname(),
        }
        store.create(names=posterior.names, derived_names=posterior.derived_names,
                     tex={p.name: p.tex for p in cfg.parameters} | _derived_tex(posterior.derived_names),
                     bounds=posterior.priors.bounds, ensembles=cfg.sampling.ensembles,
                     walkers=cfg.sampling.walkers, start=start, rng=rng, provenance=provenance)
        log.info("chain file: %s", chain)
        try:
            code = _drive(cfg, store, evaluator, store.read(), event("start", steps=0, workers=cfg.sampling.workers),
                          clock, early)
        finally:
            evaluator.close()
    return _maybe_summarize(args, chain, code)


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


def _derived_tex(names):
    tex = {"H0": r"H_0", "Omega_m": r"\Omega_{\rm m}", "sigma_8": r"\sigma_8", "S_8": r"S_8",
           "age_Gyr": r"t_0\,[\mathrm{Gyr}]", "z_re": r"z_{\rm re}", "theta_star_100": r"100\,\theta_*",
           "chi2": r"\chi^2", "a_sum": r"\Sigma a"}
    return {n: tex[n] for n in names if n in tex}


def stored_config(state):
    from infer import config
    prov = state.provenance
    return config.parse(prov["config_text"], prov["config_path"])


def cmd_resume(args) -> int:
    from infer import config
    from infer.store.lock import ChainLock
    from infer.model.posterior import Posterior
    from infer.sampling.driver import event
    from infer.store.chainfile import ChainStore
    from infer.parallel.evaluate import Interrupted
    from infer.sampling.driver import process_age
    clock = time.monotonic() - process_age()       # the wall-time budget counts from process start
    chain = Path(args.chain).resolve()
    if not chain.exists():
        raise UserError(f"{args.chain}: no such chain file")
    with _EarlySignals() as early, ChainLock(str(chain)):
        store = ChainStore(str(chain))
        store.remove_strays()
        state = store.read()
        old = stored_config(state)
        changes = []
        cfg = old
        if args.config:
            new = config.load(args.config)
            refused, changes = config.diff(old, new)
            if refused:
                raise UserError(f"refusing to resume {args.chain} with {args.config}: it changes the posterior "
                                f"or the sampler ({'; '.join(refused)}); start a new chain instead")
            cfg = new
        from dataclasses import replace
        cfg = replace(cfg, chain_path=str(chain), summary_dir=old.summary_dir)
        cfg = _override(cfg, args)
        for flag, val in (("steps", args.steps), ("workers", args.workers), ("time_limit", args.time_limit)):
            if val is not None:
                changes.append(f"--{flag.replace('_', '-')} {val}")
        cap_threads(cfg)
        posterior = Posterior(cfg)
        if posterior.data.sha256 != state.provenance.get("dataset_sha256"):
            raise UserError(f"refusing to resume {args.chain}: the dataset {cfg.dataset['file']} has changed "
                            "since the chain was started (SHA-256 differs)")
        if state.steps_done >= cfg.sampling.steps:
            log.info("%s already holds %d steps (requested %d); nothing to do — ask for more with --steps N",
                     chain, state.steps_done, cfg.sampling.steps)
            return EXIT_OK
        log.info("resuming %s at step %d towards %d%s", chain, state.steps_done, cfg.sampling.steps,
                 f" (changes: {'; '.join(changes)})" if changes else "")
        try:
            evaluator = make_evaluator(cfg, posterior, early)
        except Interrupted:
            return _paused_before_start(early, "while the workers started")
        try:
            code = _drive(cfg, store, evaluator, state, event("resume", steps=state.steps_done, changes=changes),
                          clock, early)
        finally:
            evaluator.close()
    return _maybe_summarize(args, chain, code)


def cmd_status(args) -> int:
    from infer.sampling import stopping as convergence
    from infer.analysis.diagnostics import acceptance_fraction
    from infer.store.lock import is_locked, read_holder
    from infer.store.chainfile import ChainStore
    state = ChainStore(args.chain).read()
    cfg = stored_config(state)
    s = state.samples
    E, W = s.position.shape[1:3] if s.steps else (0, 0)
    print(f"chain     {os.path.abspath(args.chain)}")
    holder = read_holder(args.chain) if is_locked(args.chain) else {}
    if holder:
        print(f"writer    process {holder.get('pid')} on {holder.get('host')} since {holder.get('started')}")
    print(f"run       {state.provenance.get('run_name')}  (dataset {os.path.basename(state.provenance.get('dataset_file', ''))})")
    print(f"steps     {state.steps_done} of up to {cfg.sampling.steps}  "
          f"({cfg.sampling.ensembles} ensembles × {cfg.sampling.walkers} walkers)")
    if state.steps_done < 8:
        print("verdict   too few steps to judge")
        return EXIT_OK
    acc = [acceptance_fraction(s.position[:, e]).mean() for e in range(s.position.shape[1])]
    v = convergence.assess(s, cfg.stopping)
    print(f"accept    {np.mean(acc):.3f}  (per ensemble: {', '.join(f'{a:.3f}' for a in acc)})")
    print(f"burn-in   {v.burn} steps (automatic rule: 5 τ_max, at most half)")
    print(f"R̂ max     {v.rhat_max:.4f}   target < {cfg.stopping.rhat_below}")
    print(f"ESS min   bulk {v.ess_bulk_min:.0f}, tail {v.ess_tail_min:.0f}   target > {cfg.stopping.ess_above:.0f}")
    print(f"τ max     {v.tau_max:.1f} steps   run length {state.steps_done} vs {cfg.stopping.tau_multiple:g} τ = "
          f"{cfg.stopping.tau_multiple * v.tau_max:.0f}")
    calls = state.steps_done * E * W
    ess = min(v.ess_bulk_min, v.ess_tail_min)
    print(f"cost      {calls} posterior calls; {calls / ess:.1f} calls per effective sample" if ess > 0 else
          f"cost      {calls} posterior calls")
    print(f"verdict   {'targets met' if v.met else 'not converged: ' + '; '.join(v.missing)}")
    if state.rejections:
        print("rejected  " + ", ".join(f"{k} {n}" for k, n in sorted(state.rejections.items())))
    if state.failures:
        print(f"crashes   {len(state.failures)} theory-process deaths (points in /run/failures)")
    stop = s.meta.get("stop_reason")
    if stop:
        print(f"stopped   {stop}")
    if args.params:
        print(f"\n{'quantity':<16}{'R̂':>9}{'ESS bulk':>10}{'ESS tail':>10}{'τ':>8}")
        for name, d in v.per_param.items():
            print(f"{name:<16}{d['rhat']:>9.4f}{d['ess_bulk']:>10.0f}{d['ess_tail']:>10.0f}{d['tau']:>8.1f}")
    return EXIT_OK


def cmd_summarize(args) -> int:
    return summarize_chain(args.chain, args.out, args.burn, args.no_model)


def summarize_chain(chain, out=None, burn=None, no_model=False) -> int:
    from infer.sampling import stopping as convergence
    from infer.report import summary
    from infer.store.chainfile import ChainStore
    chain = str(chain)
    state = ChainStore(chain).read()
    cfg = stored_config(state)
    s = state.samples
    if state.steps_done < 8:
        raise UserError(f"{chain}: only {state.steps_done} steps; nothing to summarise yet")
    if burn is not None and not 0 <= burn < state.steps_done:
        raise UserError(f"--burn must be between 0 and {state.steps_done - 1}, got {burn}")
    outdir = Path(out).resolve() if out else Path(cfg.summary_dir)
    v = convergence.assess(s, cfg.stopping, burn=burn)
    s.meta.update({"run": state.provenance.get("run_name"), "experiment": state.provenance.get("experiment"),
                   "converged": v.met, "missing": v.missing, "stop_rule": vars(cfg.stopping),
                   "rejections": state.rejections, "calls": state.steps_done * s.position.shape[1] * s.position.shape[2]})
    dataset, model = None, None
    if not no_model:
        try:
            from infer.model.posterior import Posterior
            post = Posterior(cfg)
            flat = s.log_post.reshape(-1)
            best = s.position.reshape(-1, len(s.names))[int(flat.argmax())]
            model = post.model_bands(best)
            dataset = post.data
            chi2 = post.like.chi2(model)
            dof = post.like.n - len(s.names)
            s.meta.update({"chi2_best": chi2, "n_bins": post.like.n, "dof": dof,
                           "pte_best": post.like.pte(chi2, dof)})
        except UserError as err:
            log.warning("no data-vs-model figure: %s", err)
    rule = ("set with --burn" if burn is not None else
            "automatic: 5 × the largest autocorrelation time of any quantity, at most half the run")
    paths = summary.write_summary(s, str(outdir), burn=v.burn, dataset=dataset, best_model=model,
                                  ess_target=cfg.stopping.ess_above, burn_rule=rule)
    verdict = "met every stopping target" if v.met else "NOT converged: " + "; ".join(v.missing)
    print(f"summary of {chain} ({state.steps_done} steps, {v.burn} discarded as burn-in): {verdict}")
    if "chi2_best" in s.meta:
        print(f"best sample: χ² = {s.meta['chi2_best']:.1f} for {s.meta['n_bins']} bands "
              f"({s.meta['dof']} dof after {len(s.names)} parameters), PTE = {s.meta['pte_best']:.3f}")
    for kind, path in paths.items():
        print(f"  {kind:<12} {path}")
    return EXIT_OK


def cmd_simulate(args) -> int:
    from infer.data import bandpowers as datasets
    from infer.forecast import mock
    from infer.theory import make_theory
    exp, fiducial, options = mock.read_experiment(args.spec)
    theory_settings = dict(options["theory"])
    if theory_settings["code"] == "camb":      # the fixed inputs of the fiducial go to the backend
        for key in ("sum_mnu_eV", "n_eff"):
            if key in fiducial:
                theory_settings.setdefault(key, fiducial[key])
    if args.out is None and options.get("output") is None:
        raise UserError(f"{args.spec}: no output file: give OUT on the command line or [mock] output")
    out = Path(args.out if args.out is not None else options["output"]).resolve()
    if out.exists() and not args.replace:
        raise UserError(f"{out} already exists (pass --replace to overwrite it)")
    _check_writable_dir(out)
    theory = make_theory(theory_settings, exp.ell_max + 2, where=f"{args.spec}: [theory]")
    missing = [k for k in getattr(theory, "required", theory.inputs) if k not in fiducial]
    if missing:
        raise UserError(f"{args.spec}: [fiducial] lacks {', '.join(missing)} needed by theory code "
                        f"'{theory_settings['code']}'")
    inputs = {k: v for k, v in fiducial.items() if k in theory.inputs}
    spectra = theory.compute(inputs)
    seed = args.seed if args.seed is not None else options.get("seed")
    realise = options.get("realise", True) and not args.no_noise
    bp = mock.simulate(exp, spectra, seed=seed, realise=realise)
    desc = options.get("description") or f"Mock band powers of the fictional experiment '{exp.name}'"
    desc += (f" [made by `infer simulate {Path(args.spec).name}`; fiducial {json.dumps(fiducial)}; "
             f"theory {json.dumps(theory.describe(), default=str)}; noise realisation: "
             f"{'seed ' + str(seed) if realise else 'none'}]")
    datasets.write(bp, str(out), overwrite=args.replace, description=desc)
    print(f"wrote {out}: {len(bp.value)} bands ({'/'.join(bp.spectra)}), ℓ {int(bp.ell_lo.min())}–"
          f"{int(bp.ell_hi.max())}, experiment '{exp.name}'")
    return EXIT_OK


def cmd_check(args) -> int:
    import numpy as np
    from infer import config
    from infer.model.posterior import Posterior
    cfg = config.load(args.config)
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
    values = {k: v for k, v in post.point(x).items() if k in post.theory.inputs}
    theory_t, like_t = [], []
    for _ in range(args.calls):
        t = time.perf_counter()
        spectra = post.theory.compute(values)
        t1 = time.perf_counter()
        for _ in range(20):
            post.like.loglike(spectra)
            post.priors.logpdf(x)
        like_t.append((time.perf_counter() - t1) / 20)
        theory_t.append(t1 - t)
    th, lk = float(np.median(theory_t)), float(np.median(like_t))
    print(f"theory     {th:.3f} s per call (median of {args.calls}, threads {os.environ.get('OMP_NUM_THREADS', 'all')})")
    print(f"likelihood {lk * 1e3:.3f} ms per call = {100 * lk / th:.3f} % of a theory call (goal ≤ 1 %)")
    return EXIT_OK


def cmd_salvage(args) -> int:
    from infer.store.salvage import salvage
    steps, exact = salvage(args.damaged, args.out)
    print(f"wrote {args.out}: {steps} intact steps recovered from {args.damaged} (left unchanged); "
          + ("it resumes exactly" if exact else "its random state was re-seeded, so a resume continues "
             "correctly but not bit-identically to the lost run"))
    return EXIT_OK


# -- entry point -----------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="infer", description="Cosmological parameters from CMB band powers.")
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
        sp.add_argument("--steps", type=int, help="total length to reach (overrides [sampling] steps)")
        sp.add_argument("--workers", type=int, help="worker processes for the posterior (0: in this process)")
        sp.add_argument("--time-limit", help="wall-time budget, e.g. 47:30:00; stops cleanly before it")
        sp.add_argument("--summarize", action="store_true",
                        help="when the run ends (not when paused), write the summary tables and figures")

    s = sub.add_parser("status", help="progress and convergence figures of a chain (also while it runs)")
    s.add_argument("chain")
    s.add_argument("--params", action="store_true", help="per-quantity R̂, ESS and τ")
    s.set_defaults(func=cmd_status)

    m = sub.add_parser("summarize", help="constraints tables and figures")
    m.add_argument("chain")
    m.add_argument("--out", help="output folder (default: beside the chain, named after it)")
    m.add_argument("--burn", type=int, help="steps to discard (default: automatic from τ)")
    m.add_argument("--no-model", action="store_true", help="skip the theory call for the data-vs-model figure")
    m.set_defaults(func=cmd_summarize)

    g = sub.add_parser("simulate", help="mock band powers for an invented experiment")
    g.add_argument("spec", help="experiment spec (TOML, see configs/kestrel.toml)")
    g.add_argument("out", nargs="?", help="dataset file to write (.h5; default: [mock] output of the spec)")
    g.add_argument("--seed", type=int, help="seed of the noise realisation")
    g.add_argument("--no-noise", action="store_true", help="band powers equal to the binned fiducial theory")
    g.add_argument("--replace", action="store_true", help="overwrite an existing output file")
    g.set_defaults(func=cmd_simulate)

    c = sub.add_parser("check", help="validate a run file and time the theory and likelihood")
    c.add_argument("config")
    c.add_argument("--calls", type=int, default=3, help="theory calls to time")
    c.set_defaults(func=cmd_check)

    v = sub.add_parser("salvage", help="copy the intact part of a damaged chain into a new file")
    v.add_argument("damaged")
    v.add_argument("out")
    v.set_defaults(func=cmd_salvage)
    return p


def _setup_logging(debug: bool, quiet: bool):
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("infer: %(message)s" if not debug else
                                           "infer %(asctime)s %(levelname)s: %(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(logging.DEBUG if debug else logging.WARNING if quiet else logging.INFO)
    log.propagate = False


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    _setup_logging(args.debug, args.quiet)
    from infer.parallel import mpi
    parallel = mpi.world_size() > 1
    if parallel and not mpi.is_root():
        return mpi.serve(args)      # evaluates for rank 0 in run/resume; every other command runs on rank 0 only
    try:
        if parallel and args.command in mpi.MPI_COMMANDS:
            mpi.start()
        return args.func(args)
    except UserError as err:
        if args.debug:
            raise
        print(f"infer: error: {err}", file=sys.stderr)
        return EXIT_USAGE
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
        if parallel and args.command in mpi.MPI_COMMANDS:
            mpi.shutdown()


if __name__ == "__main__":
    sys.exit(main())
