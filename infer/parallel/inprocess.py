"""Evaluation in the calling process: no isolation, no copies; for cheap models and debugging.

A Python-level wait inside the log-density (a sleep) ends at once on a signal: the span of each call is
marked ``busy`` so that the driver's signal handler may raise `Interrupted` inside it. A C or Fortran call
finishes first — use worker processes (`infer.parallel.pool`) for slow Boltzmann codes.
"""
from __future__ import annotations

import numpy as np

from infer.parallel.base import Evaluator, Interrupted


class InProcess(Evaluator):
    """Evaluate a built log-density (see `infer.parallel.base`) here, point after point."""

    def __init__(self, density):
        super().__init__(density.blob_names)
        self.density = density
        self.busy = False           # True only while a call runs: the signal handler may interrupt it

    @property
    def posterior(self):            # the name the driver and older tests use
        return self.density

    def evaluate(self, points):
        n = len(points)
        lp, blobs, reasons = np.empty(n), np.empty((n, self.blob_size)), [None] * n
        for i, x in enumerate(points):
            if self.should_stop():
                raise Interrupted
            self.busy = True
            try:
                lp[i], blobs[i], reasons[i] = self.density(x)
            finally:
                self.busy = False
        return lp, blobs, reasons
