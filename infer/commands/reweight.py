"""``infer reweight CHAIN [TARGET.toml] --out NEW.h5``: importance reweighting of a finished chain.

The method and its checks are `infer.analysis.reweight`, the file `infer.store.reweighted`. This module
parses the command line, checks the output path before any theory call, and runs the exact calls (a
changed dataset or theory) the way a long job needs: in this process, in worker processes (``--workers``)
or on the MPI ranks when launched under MPI; with a live bar on a terminal or a log line per ``[sampling]
log_minutes`` of the target in a batch job; and crash-safely — the calls so far are checkpointed into
the hidden file ``.NEW.h5.partial`` beside the output (`checkpoint_of`) every ``[sampling]
checkpoint_minutes`` of the target and when SIGTERM/SIGINT stops the command (exit 75); the same command run
again continues from them, and the checkpoint is removed once NEW.h5 is written. When the weights are
refused the checkpoint stays, so a rerun (say with another ``--min-ess``) makes no theory call.
"""
from __future__ import annotations

import logging
import math
import signal
import sys
import time
from pathlib import Path

import numpy as np

from infer.commands import integer
from infer.errors import EXIT_OK, EXIT_PAUSED, UserError

log = logging.getLogger("infer")

#: The exact calls use the evaluating MPI ranks.
MPI = True


def _at_least_one(text):
    import argparse
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number (effective draws), got {text!r}") from None
    if not (math.isfinite(value) and value >= 1):
        raise argparse.ArgumentTypeError(f"must be a finite number >= 1 (effective draws), got {text!r}")
    return value


def register(sub) -> None:
    r = sub.add_parser("reweight", help="importance-reweight a finished chain to a changed posterior "
                                        "(added priors, another dataset, other theory settings)")
    r.add_argument("chain", help="chain file (ensemble or surrogate engine)")
    r.add_argument("target", nargs="?", help="target run file: its posterior replaces the chain's "
                                             "(with --add: its dataset's likelihood is added)")
    r.add_argument("--out", required=True, help="new file to write (.h5)")
    r.add_argument("--prior", action="append", default=[], metavar="NAME=normal:MEAN,SD",
                   help="multiply in a prior on a sampled or derived quantity (normal:MEAN,SD or uniform:LO,HI); "
                        "repeatable")
    r.add_argument("--add", action="store_true",
                   help="the target's dataset is independent of the chain's and is added (its priors are not used)")
    r.add_argument("--workers", type=integer(0, "worker processes"),
                   help="worker processes for the exact calls (default: the target's [sampling] workers)")
    r.add_argument("--burn", type=integer(0, "steps to discard"),
                   help="steps of an ensemble chain to discard (default: automatic from τ, as the summary)")
    r.add_argument("--thin", type=integer(1, "keep every k-th step"),
                   help="keep every k-th step of an ensemble chain (default: ⌈τ⌉, close to independent draws)")
    r.add_argument("--min-ess", type=_at_least_one, default=None,
                   help="refuse weights whose Kish effective sample size is below this (default 100)")
    r.add_argument("--replace", action="store_true", help="replace an existing reweighted chain file")
    r.set_defaults(func=run)


def check_output(out, chain, target_cfg=None, replace_existing: bool = False) -> Path:
    """The output file: ``.h5``, not the chain or a dataset, new unless ``replace_existing`` (and then a
    reweighted-chain file of ours); its folder writable. Checked before any theory call."""
    from infer import paths
    from infer.store.reweighted import FORMAT
    p = Path(out).resolve()
    if p.suffix != ".h5":
        raise UserError(f"--out must end in .h5, got {out}")
    if p == Path(chain).resolve():
        raise UserError(f"--out {out} is the chain being reweighted; a chain is never written over")
    if target_cfg is not None and str(p) in (target_cfg.dataset.get("file"), target_cfg.dataset.get("covariance")):
        raise UserError(f"--out {out} is the target's dataset file")
    if p.exists():
        if not replace_existing:
            raise UserError(f"{p} already exists (pass --replace to replace a reweighted chain file)")
        paths.replaceable(p, FORMAT, "reweighted chain", "replaces")
    paths.file_folder(p)
    return p


def checkpoint_of(out: Path) -> Path:
    """The hidden file beside NEW.h5 that holds the exact calls of an unfinished reweighting."""
    return out.with_name(f".{out.name}.partial")


class _Calls:
    """The exact calls of ``infer reweight``: batched, with progress, checkpoints and a clean stop."""

    def __init__(self, out: Path, fresh: bool, interactive: bool | None = None):
        self.out, self.fresh = out, fresh
        self.interactive = sys.stderr.isatty() if interactive is None else interactive
        self.signal = None

    def _handler(self, signum, frame):
        self.signal = signal.Signals(signum).name

    def __call__(self, factory, points, key, workers, cfg):
        from infer.parallel import Interrupted, cap_in_process_threads, make_evaluator, mpi
        from infer.store.reweighted import FORMAT, Partial, ReweightedFile
        from infer import paths
        path, n = checkpoint_of(self.out), len(points)
        store, part = ReweightedFile(str(path)), None
        if path.exists() and not self.fresh:
            if paths.hdf5_format(path) != FORMAT:
                raise UserError(f"{path} exists and is not a checkpoint of infer reweight; move it away")
            part = store.read_partial()
            if part is None or part.key != key or len(part.done) != n:
                raise UserError(f"{path}: holds the exact calls of another reweighting (chain, change or choice of "
                                "draws); pass --replace to start anew, or choose another --out")
            log.info("reweight: %d of %d exact calls are in %s and are kept", part.done.sum(), n, path)
        if part is None:
            part = Partial(key, np.zeros(n, bool), np.full(n, -np.inf), np.empty((n, 0)), [None] * n, ())
        todo = np.flatnonzero(~part.done)
        if not len(todo):
            return part.log_post, part.blobs, part.reasons, part.blob_names
        threads = cfg.sampling.threads_per_worker
        cap_in_process_threads(workers, threads)
        batch = min(max(8, 4 * max(1, workers, mpi.world_size() - 1)), len(todo))
        ranks = mpi.world_size()
        log.info("reweight: %d exact calls of %s at the chain's draws (%s)", len(todo), cfg.path,
                 f"{ranks - 1} MPI ranks" if ranks > 1 else f"{workers} worker processes" if workers
                 else "in this process")
        bar = None
        if self.interactive:
            from tqdm import tqdm
            bar = tqdm(total=n, initial=int(part.done.sum()), unit="call", desc="exact calls", file=sys.stderr,
                       dynamic_ncols=True)
        old = {s: signal.signal(s, self._handler) for s in (signal.SIGTERM, signal.SIGINT)}
        t0 = last_log = last_save = time.monotonic()
        try:
            with make_evaluator(factory, workers, threads, should_stop=lambda: self.signal is not None) as ev:
                for start in range(0, len(todo), batch):
                    if self.signal is not None:
                        raise Interrupted
                    idx = todo[start:start + batch]
                    lp, blobs, reasons = ev.evaluate(points[idx])
                    if not part.blob_names:
                        part.blobs, part.blob_names = np.full((n, blobs.shape[1]), np.nan), tuple(ev.blob_names)
                    part.log_post[idx], part.blobs[idx], part.done[idx] = lp, blobs, True
                    for i, why in zip(idx, reasons):
                        part.reasons[i] = why
                    done, now = start + len(idx), time.monotonic()
                    if bar is not None:
                        bar.update(len(idx))
                    elif now - last_log >= 60.0 * cfg.sampling.log_minutes:
                        last_log, rate = now, (now - t0) / done
                        log.info("reweight: %d of %d exact calls (%.2f s each, about %.0f s to go)",
                                 done + n - len(todo), n, rate, rate * (len(todo) - done))
                    if now - last_save >= 60.0 * cfg.sampling.checkpoint_minutes:
                        store.write_partial(part)
                        last_save = now
        except Interrupted:
            store.write_partial(part)
            raise _Paused(f"reweight: paused after {int(part.done.sum())} of {n} exact calls "
                          f"(signal {self.signal}); they are in {path}; run the same command again to continue")
        finally:
            for s, h in old.items():
                signal.signal(s, h)
            if bar is not None:
                bar.close()
        store.write_partial(part)       # kept if the weights are refused: a rerun needs no theory call
        return part.log_post, part.blobs, part.reasons, part.blob_names


class _Paused(Exception):
    pass


def describe(rw) -> str:
    """The lines ``infer reweight`` prints."""
    r, p, c = rw.report, rw.parent, rw.change
    target = c["target_path"] and (("dataset of " if c["add"] else "posterior of ") + c["target_path"])
    lines = [f"reweighted {p['path']} ({p['rule']}) by {'; '.join(filter(None, [target, *c['prior_text']]))}",
             f"  {c['mode']}: {r['exact_calls']} exact calls in {r['seconds']:.1f} s",
             f"  weights: Kish ESS {r['ess']:.0f} of {r['draws']} draws ({100 * r['ess'] / r['draws']:.0f} %), "
             f"Pareto k̂ {r['khat']:.2f} (reliable below {min(r['khat_threshold'], r['khat_max']):.2f})"]
    if r["khat"] > r["khat_threshold"]:
        lines.append(f"  caution: k̂ is above the bound {r['khat_threshold']:.2f} for {r['draws_used']} draws "
                     "(Vehtari et al. 2024): Monte Carlo errors may be underestimated")
    if not p.get("converged"):
        lines.append("  caution: the chain did not meet its stopping rule (" + "; ".join(p.get("missing", []))
                     + "): the reweighted numbers inherit that")
    return "\n".join(lines)


def run(args) -> int:
    from infer.analysis import reweight as rw
    change = rw.Change(args.target, args.add, tuple(rw.parse_prior(t) for t in args.prior))
    out = {}

    def check_out(target_cfg):
        out["path"] = check_output(args.out, args.chain, target_cfg, args.replace)
        return out["path"]

    runner = {}

    def calls(*a):
        runner["calls"] = _Calls(out["path"], args.replace)
        return runner["calls"](*a)

    try:
        result = rw.reweight(args.chain, change, check_out, calls=calls, workers=args.workers, burn=args.burn,
                             thin=args.thin, min_ess=rw.MIN_ESS if args.min_ess is None else args.min_ess)
    except _Paused as stop:
        log.info("%s", stop)
        return EXIT_PAUSED
    checkpoint = checkpoint_of(out["path"])
    if "calls" in runner and checkpoint.exists():      # only the checkpoint of this reweighting's own calls
        checkpoint.unlink()
    print(describe(result))
    print(f"wrote {out['path']}; summarise it with `infer summarize {args.out}`")
    return EXIT_OK
