"""Progress of a long run: a live bar on a terminal (tqdm), periodic log lines in batch jobs.

The same figures in both: step, acceptance, worst R̂, smallest ESS and an estimated time to the stopping
targets (`convergence.eta_steps` × the measured time per step).
"""
from __future__ import annotations

import logging
import math
import sys
import time

log = logging.getLogger("infer")


def _fmt_eta(seconds: float) -> str:
    if not math.isfinite(seconds):
        return "?"
    seconds = int(seconds)
    h, rem = divmod(seconds, 3600)
    return f"{h}:{rem // 60:02d}:{rem % 60:02d}" if h else f"{rem // 60}:{rem % 60:02d}"


def line(step, total, accept, verdict=None, eta_seconds=math.nan) -> str:
    parts = [f"step {step}/{total}", f"accept {accept:.2f}"]
    if verdict is not None:
        parts += [f"R̂max {verdict.rhat_max:.3f}", f"ESSmin {min(verdict.ess_bulk_min, verdict.ess_tail_min):.0f}",
                  f"to targets ≈ {_fmt_eta(eta_seconds)}"]
    return " | ".join(parts)


class Progress:
    def __init__(self, done: int, total: int, log_minutes: float = 1.0, interactive: bool | None = None):
        self.total = total
        self.interactive = sys.stderr.isatty() if interactive is None else interactive
        self.log_every = 60.0 * log_minutes
        self.last_log = time.monotonic()
        self.verdict, self.eta = None, math.nan
        self.bar = None
        if self.interactive:
            from tqdm import tqdm
            self.bar = tqdm(total=total, initial=done, unit="step", dynamic_ncols=True, file=sys.stderr,
                            bar_format="{l_bar}{bar}| {n_fmt}/{total_fmt} [{elapsed}<{remaining}] {postfix}")

    def update(self, step: int, accept: float, verdict=None, eta_seconds=math.nan):
        if verdict is not None:
            self.verdict, self.eta = verdict, eta_seconds
        if self.bar is not None:
            self.bar.n = step
            v = self.verdict
            post = f"acc {accept:.2f}"
            if v is not None:
                post += (f" R̂max {v.rhat_max:.3f} ESSmin {min(v.ess_bulk_min, v.ess_tail_min):.0f}"
                         f" targets≈{_fmt_eta(self.eta)}")
            self.bar.set_postfix_str(post, refresh=False)
            self.bar.refresh()
        elif time.monotonic() - self.last_log >= self.log_every:
            self.last_log = time.monotonic()
            log.info(line(step, self.total, accept, self.verdict, self.eta))

    def close(self):
        if self.bar is not None:
            self.bar.close()
