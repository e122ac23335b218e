"""``infer calibrate CONFIG --spec SPEC --mocks N --out STEM``: simulation-based calibration of a run.

Draws N parameter points from the run file's prior, makes one mock dataset per point from the experiment
spec, runs the run file's engine on each and reports, per parameter, the coverage of the central 68 % and
95 % intervals and the rank histogram (`infer.forecast.calibrate`, after Talts et al. 2018,
arXiv:1804.06788). Writes ``STEM.calibration.h5`` (the record of finished mocks; the same command again
continues it, a larger ``--mocks`` extends it, other arguments are refused), ``STEM.calibration.md`` (the
table) and ``STEM.ranks.png`` (the figure). ``--fit-cov-scale`` miscalibrates on purpose.
"""
from __future__ import annotations

import logging
import sys
import time
from pathlib import Path

from infer.commands import integer
from infer.errors import EXIT_OK, EXIT_PAUSED, UserError

log = logging.getLogger("infer")
MPI = False


def register(sub) -> None:
    c = sub.add_parser("calibrate", help="simulation-based calibration: coverage and rank histograms over mocks")
    c.add_argument("config", help="run file (its prior, dataset layout and engine are calibrated)")
    c.add_argument("--spec", help="experiment spec whose Knox covariance gives the mocks' noise (required)")
    c.add_argument("--mocks", type=integer(1, "mock datasets"), default=200, help="mock datasets (default 200)")
    c.add_argument("--out", help="output stem: STEM.calibration.h5/.md and STEM.ranks.png "
                                 "(default: the run's chain path without .h5, e.g. chains/NAME)")
    c.add_argument("--seed", type=integer(0, "seed"), help="seed of the mocks (default: the run file's [run] seed)")
    c.add_argument("--fit-cov-scale", type=float, default=1.0,
                   help="fit with this multiple of the true covariance (≠ 1 miscalibrates on purpose)")
    c.add_argument("--bins", type=integer(2, "rank-histogram bins"), help="rank-histogram bins (default: N/20, 2–20)")
    c.add_argument("--workers", type=integer(0, "worker processes"),
                   help="worker processes, one mock each (default: [sampling] workers; 0: in this process)")
    c.set_defaults(func=cmd_calibrate)


def outputs(stem) -> dict[str, Path]:
    stem = Path(stem).expanduser().resolve()
    return {"record": stem.with_name(stem.name + ".calibration.h5"), "table": stem.with_name(stem.name + ".calibration.md"),
            "figure": stem.with_name(stem.name + ".ranks.png")}


def cmd_calibrate(args) -> int:
    from infer import config, paths
    from infer.forecast import calibrate as cal
    from infer.parallel import Interrupted, cap_in_process_threads
    from infer.run import EarlySignals
    if args.spec is None:
        raise UserError(f"{args.config}: a calibration needs an experiment spec for the mocks' noise: give --spec SPEC "
                        "(see configs/quick_experiment.toml)")
    from infer.parallel import mpi
    if mpi.world_size() > 1:
        raise UserError("infer calibrate runs its mocks in worker processes on one node (--workers); start it "
                        "without mpirun")
    cfg = config.load(args.config)
    out = outputs(args.out if args.out is not None else Path(cfg.chain_path).with_suffix(""))
    paths.file_folder(out["record"])
    record = [None]

    def check(req):
        if out["record"].exists():
            paths.readable(out["record"], "calibration record")
            rec = cal.Record.read(out["record"])
            rec.check(req, out["record"])
            record[0] = cal.Record(req, rec.rows, rec.failed)
        else:
            record[0] = cal.Record(req)

    setup = cal.prepare(cfg, args.spec, args.fit_cov_scale, args.seed, check=check)
    rec = record[0]
    workers = cfg.sampling.workers if args.workers is None else args.workers
    cap_in_process_threads(workers, cfg.sampling.threads_per_worker)
    before = len([i for i in rec.done if i < args.mocks])
    log.info("calibration of '%s' (%s engine) with %s: %d mocks, %d finished before, %d worker%s, fit covariance "
             "%g × the spec's", cfg.name, setup.engine, Path(args.spec).name, args.mocks, before, workers,
             "" if workers == 1 else "s", args.fit_cov_scale)
    progress = Bar(before, args.mocks, cfg.sampling.log_minutes)
    with EarlySignals() as early:
        try:
            cal.run(setup, rec, out["record"], args.mocks, workers, cfg.sampling.threads_per_worker,
                    should_stop=early.is_set, progress=progress)
        except Interrupted:
            progress.close()
            log.info("paused (%s) with %d of %d mocks finished, kept in %s; run the same command again to continue",
                     early.signal or "stop", len([i for i in rec.done if i < args.mocks]), args.mocks, out["record"])
            return EXIT_PAUSED
    progress.close()
    rows = rec.sorted(args.mocks)
    failed = [r for i, r in zip(rec.failed["index"], rec.failed["reason"]) if i < args.mocks]
    verdict = cal.assess(rows["rank"], setup.names, args.bins or cal.default_bins(len(rows["rank"])))
    text = table(verdict, rows, failed, setup, args)
    from infer.atomic import write_text_atomic
    from infer.report.figures.ranks import ranks
    write_text_atomic(out["table"], text)
    tex = {p.name: p.tex for p in cfg.sampled}
    ranks(verdict, out["figure"], tex, note=f"fit covariance ×{args.fit_cov_scale:g}" if args.fit_cov_scale != 1 else "")
    print(text, end="")
    print(f"wrote {out['table']}, {out['figure']} (record: {out['record']})")
    return EXIT_OK


def table(verdict, rows, failed, setup, args) -> str:
    """The Markdown report: one row per parameter, then what the mocks were."""
    from infer.forecast.calibrate import LEVELS, binomial_band
    import numpy as np
    n, B = verdict.n, verdict.bins
    lo, hi = binomial_band(n, B, 0.99)
    head = "| parameter | " + " | ".join(f"central {round(100 * lv)} % holds truth (pull)" for lv in LEVELS) + \
        f" | rank χ² ({B - 1} dof) | p-value | bins outside 99 % band |"
    lines = [f"## Calibration of `{Path(setup.cfg.path).name}` over {n} mocks", "", head,
             "|" + "---|" * (len(LEVELS) + 4)]
    for j, name in enumerate(verdict.names):
        cells = [f"{verdict.coverage[k, j]:.3f} ± {verdict.error[k, j]:.3f} ({verdict.pull[k, j]:+.1f}σ)"
                 for k in range(len(LEVELS))]
        outside = int(np.sum((verdict.counts[:, j] < lo) | (verdict.counts[:, j] > hi)))
        lines.append(f"| {name} | " + " | ".join(cells) + f" | {verdict.chi2[j]:.1f} | {verdict.p_value[j]:.3g} | "
                     f"{outside} of {B} |")
    conv = int(np.sum(rows["converged"] > 0.5))
    lines += ["", f"- mocks: {n} finished ({conv} met the engine's targets"
                  f"{'' if conv == n else '; the others are included, as their ranks are what the pipeline gave'})"
                  + (f", {len(failed)} failed and left out ({'; '.join(sorted(set(failed)))})" if failed else ""),
              f"- engine: {setup.engine}; median weight/chain ESS {np.median(rows['ess']):.0f}, median exact calls "
              f"{np.median(rows['exact_calls']):.0f}, median {np.median(rows['seconds']):.2f} s per mock",
              f"- fit covariance: {args.fit_cov_scale:g} × the spec's Knox covariance"
              + (" (miscalibrated on purpose)" if args.fit_cov_scale != 1 else ""),
              f"- coverage error: binomial, [p̂(1 − p̂)/N]^½; pull: (p̂ − p)/[p(1 − p)/N]^½; rank χ²: Pearson's against "
              f"equal counts (scipy.stats.chisquare); 99 % band of one bin: {lo:.0f}–{hi:.0f} of Binomial({n}, 1/{B})",
              f"- seed {setup.seed}; spec `{Path(args.spec).name}`", ""]
    return "\n".join(lines)


class Bar:
    """Mocks finished: a live bar on a terminal (tqdm), a log line per ``log_minutes`` otherwise."""

    def __init__(self, done: int, total: int, log_minutes: float):
        self.total, self.every, self.last, self.t0, self.first = total, 60.0 * log_minutes, time.monotonic(), \
            time.monotonic(), done
        self.bar = None
        if sys.stderr.isatty():
            from tqdm import tqdm
            self.bar = tqdm(total=total, initial=done, unit="mock", dynamic_ncols=True, file=sys.stderr)

    def __call__(self, done: int, total: int) -> None:
        if self.bar is not None:
            self.bar.n = done
            self.bar.refresh()
            return
        now = time.monotonic()
        if now - self.last >= self.every or done == total:
            self.last = now
            rate = (done - self.first) / max(now - self.t0, 1e-9)
            eta = (total - done) / rate if rate > 0 else float("nan")
            log.info("calibration: %d/%d mocks finished (%.1f s per mock, about %.0f s to go)", done, total,
                     1 / rate if rate > 0 else float("nan"), eta)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None
