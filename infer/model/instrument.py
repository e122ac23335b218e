"""Instrument terms of multi-frequency band powers: calibration, polarisation efficiency, beam modes.

A channel c observes its temperature map scaled by a calibration g_c and its polarisation maps scaled
by g_c ε_c (ε_c its polarisation efficiency), so a spectrum of maps (X of channel i, Y of channel j)
scales as (common practice of CMB likelihoods; a power spectrum is quadratic in the maps):

    TT: g_i g_j        TE: g_i g_j ε_j        EE, BB: g_i g_j ε_i ε_j

(TE takes T from the first channel of the pair and E from the second, as the dataset format does). The
model is scaled, never the data, so the covariance stays the data's own. The global ``calibration`` c of
single-channel datasets multiplies everything by c² on top (the two are degenerate when both are free).

Beam uncertainty is given by the dataset as K eigenmodes b_k (K, N), the fractional change of each band
per unit mode amplitude; the amplitudes β_k have Gaussian priors (usually N(0, 1): the modes are scaled
by their standard deviations), and the model is multiplied by (1 + Σ_k β_k b_k) — linear in β, so the
β_k can also be marginalised analytically (`infer.model.marginal`).

Parameter names: ``cal_<channel>``, ``poleff_<channel>`` (default 1) for each named channel and
``beam_<k>`` (default 0) for each beam mode k = 0 … K−1.
"""
from __future__ import annotations

import numpy as np

from infer.model.foregrounds import Layout, channel_key

#: The global map calibration of single-channel data, and its neutral value.
CALIBRATION = "calibration"


class Instrument:
    """The per-band multiplicative factor s(θ) (n, N) of a dataset's instrument terms."""

    def __init__(self, layout: Layout, beam_modes: np.ndarray):
        self.layout = layout
        self.modes = np.asarray(beam_modes, float)             # (K, N)
        kind = layout.kind
        chans = [channel_key(c.name) for c in layout.channels] if layout.named else []
        self.cal = tuple(f"cal_{c}" for c in chans)
        self.poleff = tuple(f"poleff_{c}" for c in chans)
        self.beams = tuple(f"beam_{k}" for k in range(self.modes.shape[0]))
        self.params = {CALIBRATION: 1.0, **{n: 1.0 for n in self.cal + self.poleff},
                       **{n: 0.0 for n in self.beams}}
        # How many polarisation maps each band has from its first and second channel.
        self._pol1 = np.isin(kind, ("EE", "BB")).astype(float)
        self._pol2 = np.isin(kind, ("TE", "EE", "BB")).astype(float)

    def gains(self, v: dict[str, np.ndarray], given=None) -> np.ndarray:
        """(n, N) calibration and polarisation-efficiency factor (beam modes excluded); ``given`` names the
        parameters that may differ from 1 (all, if None)."""
        c = np.asarray(v[CALIBRATION], float)
        out = (c ** 2)[:, None] * np.ones((1, self.layout.n))
        if self.cal and (given is None or any(n in given for n in self.cal + self.poleff)):
            g = np.stack([np.asarray(v[n], float) for n in self.cal], axis=1)          # (n, C)
            e = np.stack([np.asarray(v[n], float) for n in self.poleff], axis=1)
            L = self.layout
            out = out * L.pair_product(g) * e[:, L.c1] ** self._pol1 * e[:, L.c2] ** self._pol2
        return out

    def beam_factor(self, v: dict[str, np.ndarray], skip=()) -> np.ndarray | None:
        """(n, N) factor 1 + Σ β_k b_k over the modes not in ``skip``; None when no mode is active."""
        use = [k for k, n in enumerate(self.beams) if n not in skip]
        if not use:
            return None
        beta = np.stack([np.asarray(v[self.beams[k]], float) for k in use], axis=1)    # (n, K')
        return 1.0 + beta @ self.modes[use]
