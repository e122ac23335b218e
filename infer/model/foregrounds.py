"""Foreground terms of multi-frequency band powers: one small class per sky component.

Every term adds, to the band powers of the bands it touches, a sum of *amplitude × unit template*:

    F_b = Σ_a  A_a · W_b · [ s(ℓ) ] · g_{c1(b)} g_{c2(b)}

with W_b the band's window function, s(ℓ) the component's D_ℓ shape (normalised at a pivot multipole) and
g_c the component's SED in CMB thermodynamic units for channel c, relative to the reference frequency
(`infer.model.sed`: every SED is an intensity SED converted with dB_ν/dT at T₀ = 2.7255 K, Fixsen 2009,
for band centres or for a bandpass given as data). The amplitudes A_a enter linearly — they can be
marginalised analytically (`infer.model.marginal`) — while the shape and SED parameters (indices,
temperatures) enter non-linearly and are sampled or fixed. Amplitudes are D_ℓ in μK² at the pivot and
at the reference frequency (the reference × reference spectrum), so their meaning does not depend on
the channels of a dataset.

The components (common practice of multi-frequency CMB likelihoods; forms and typical values from memory
of that literature, e.g. Dunkley et al. 2013, JCAP 07, 025; Choi et al. 2020, JCAP 12, 045):

* `PoissonPairs` — unresolved point sources, a white C_ℓ (D_ℓ ∝ ℓ², pivot ℓ = 3000), one free amplitude
  per TT frequency pair: ``ps_<pair>`` (e.g. ``ps_90x150``), no SED assumed.
* `PoissonSed` — the same shot noise with one amplitude and a power-law flux SED I_ν ∝ ν^α between
  channels: ``ps_amp``, ``ps_index`` (α).
* `Cib` — clustered cosmic infrared background: D_ℓ ∝ (ℓ/3000)^n with a modified-blackbody SED
  ν^β B_ν(T_d): ``cib_amp``, ``cib_ell_index`` (n), ``cib_beta``, ``cib_temp`` (K).
* `Tsz` — thermal Sunyaev–Zel'dovich: the non-relativistic f(x) = x coth(x/2) − 4 (Sunyaev & Zel'dovich
  1972), ℓ shape from a data file: ``tsz_amp``.
* `Ksz` — kinetic SZ: flat in thermodynamic units (a Doppler shift of the CMB itself), ℓ shape from a
  data file: ``ksz_amp``.
* `Dust` — Galactic thermal dust in TT/TE/EE: D_ℓ ∝ (ℓ/80)^(α+2) (C_ℓ ∝ ℓ^α), modified blackbody:
  ``dust_<kind>_amp`` per spectrum kind, ``dust_ell_index`` (α), ``dust_beta``, ``dust_temp`` (K);
  its amplitudes are at the dust reference frequency (353 GHz unless set).

Templates are data files, never code (`read_shape`). All terms are vectorised over points: parameter
values arrive as arrays (n,), templates leave as arrays broadcastable to (n, N).
"""
from __future__ import annotations

import re

import numpy as np

from infer.errors import UserError
from infer.model import sed

#: Pivot multipoles of the amplitudes (common practice: extragalactic terms at ℓ = 3000, dust at ℓ = 80).
PIVOT_EXTRAGALACTIC = 3000.0
PIVOT_DUST = 80.0
#: Physical ranges of the non-linear parameters (a prior must lie inside; `check_ranges`).
ELL_INDEX_RANGE = (-6.0, 6.0)
FLUX_INDEX_RANGE = (-4.0, 6.0)


def channel_key(name: str) -> str:
    """A channel name as it appears in parameter names: '.', '-', '+' become '_' ("217.5" → "217_5")."""
    return re.sub(r"[^A-Za-z0-9_]", "_", name)


class Layout:
    """What every term needs of a dataset: band kinds, the channel index of each band's two maps, the
    channels' frequencies and bandpasses, and the window average ``avg(shape)`` of D_ℓ shapes."""

    def __init__(self, data, windows, window_ell):
        self.kind = np.asarray(data.kind).astype(str)
        self.n = len(self.kind)
        self.ell = np.asarray(window_ell, float)
        self.W = windows                                   # (N, L), dense or scipy.sparse
        names = [c.name for c in data.channels]
        self.channels = tuple(data.channels)
        index = {nm: i for i, nm in enumerate(names)}
        self.c1 = np.array([index[c] for c in np.asarray(data.channel_1).tolist()], int)
        self.c2 = np.array([index[c] for c in np.asarray(data.channel_2).tolist()], int)
        self.pair = np.asarray(data.pair).astype(str)
        self.named = all(c.name != "" for c in self.channels)

    def avg(self, shape: np.ndarray) -> np.ndarray:
        """Window averages: shape (L,) → (N,), or (n, L) → (n, N)."""
        shape = np.asarray(shape, float)
        if shape.ndim == 1:
            return np.asarray(self.W @ shape).ravel()
        return np.asarray(self.W @ shape.T).T

    def mask(self, kinds) -> np.ndarray:
        return np.isin(self.kind, list(kinds)).astype(float)

    def sed(self, intensity, params: tuple, nu0: float) -> np.ndarray:
        """(n, C) thermodynamic amplitude of an intensity SED per channel, relative to ``nu0`` (GHz):
        ``intensity(nu (S,) GHz, *params (n, 1)) -> (n, S)``."""
        ref = intensity(np.array([nu0]), *params)[:, 0] / sed.dbdt(np.array([nu0]))[0]
        cols = []
        for ch in self.channels:
            if ch.bandpass_nu_ghz is not None:
                nu, w = np.asarray(ch.bandpass_nu_ghz, float), np.asarray(ch.bandpass_weight, float)
                num = np.trapezoid(w * intensity(nu, *params), nu, axis=1)
                cols.append(num / np.trapezoid(w * sed.dbdt(nu), nu))
            else:
                cols.append(intensity(np.array([ch.nu_ghz]), *params)[:, 0] / sed.dbdt(np.array([ch.nu_ghz]))[0])
        return np.stack(cols, axis=1) / ref[:, None]

    def pair_product(self, g: np.ndarray) -> np.ndarray:
        """(n, N): g[:, c1(b)] · g[:, c2(b)] for per-channel factors g (n, C)."""
        return g[:, self.c1] * g[:, self.c2]


def _col(v, name):
    return np.asarray(v[name], float)[:, None]


def power_law(ell, pivot, index):
    """(n, L): (ℓ/pivot)^index for index (n, 1)."""
    return (np.maximum(ell, 1.0)[None, :] / pivot) ** index


class Term:
    """Base of a foreground term: ``params`` (name → default), ``amplitudes`` (the linear ones),
    ``shape_params`` (non-linear, with their physical ranges), ``templates(v)`` (name → (n, N) per unit)."""

    name = ""
    kinds: tuple[str, ...] = ("TT",)

    def __init__(self, layout: Layout):
        self.layout = layout
        self.params: dict[str, float] = {}
        self.amplitudes: tuple[str, ...] = ()
        self.ranges: dict[str, tuple[float, float]] = {}
        self._cache = (None, None)

    def templates(self, v: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        """Unit-amplitude templates, cached on the values of the non-linear parameters."""
        key = tuple(np.asarray(v[p], float).tobytes() for p in self.ranges)
        if self._cache[0] != key:
            self._cache = (key, self._templates(v))
        return self._cache[1]

    def _templates(self, v):
        raise NotImplementedError


class PoissonPairs(Term):
    name = "poisson"

    def __init__(self, layout):
        super().__init__(layout)
        shape = layout.avg((layout.ell / PIVOT_EXTRAGALACTIC) ** 2)
        tt = layout.kind == "TT"
        self._fixed = {}
        for pair in dict.fromkeys(layout.pair[tt].tolist()):
            a, b = pair.split("x")
            name = f"ps_{channel_key(a)}x{channel_key(b)}"
            self._fixed[name] = (shape * (tt & (layout.pair == pair)))[None, :]
        self.params = {n: 0.0 for n in self._fixed}
        self.amplitudes = tuple(self._fixed)

    def _templates(self, v):
        return self._fixed


class PoissonSed(Term):
    name = "poisson"

    def __init__(self, layout, nu0):
        super().__init__(layout)
        self.nu0 = nu0
        self._shape = layout.avg((layout.ell / PIVOT_EXTRAGALACTIC) ** 2) * layout.mask(("TT",))
        self.params = {"ps_amp": 0.0, "ps_index": 0.0}
        self.amplitudes = ("ps_amp",)
        self.ranges = {"ps_index": FLUX_INDEX_RANGE}

    def _templates(self, v):
        g = self.layout.sed(lambda nu, a: nu[None, :] ** a, (_col(v, "ps_index"),), self.nu0)
        return {"ps_amp": self._shape[None, :] * self.layout.pair_product(g)}


class Cib(Term):
    name = "cib"

    def __init__(self, layout, nu0):
        super().__init__(layout)
        self.nu0 = nu0
        self._tt = layout.mask(("TT",))
        self.params = {"cib_amp": 0.0, "cib_ell_index": 0.8, "cib_beta": 1.6, "cib_temp": 25.0}
        self.amplitudes = ("cib_amp",)
        self.ranges = {"cib_ell_index": ELL_INDEX_RANGE, "cib_beta": sed.BETA_RANGE, "cib_temp": sed.TD_RANGE}

    def _templates(self, v):
        n_ell = _col(v, "cib_ell_index")
        shape = self.layout.avg(power_law(self.layout.ell, PIVOT_EXTRAGALACTIC, n_ell))
        g = self.layout.sed(sed.mbb, (_col(v, "cib_beta"), _col(v, "cib_temp")), self.nu0)
        return {"cib_amp": shape * self.layout.pair_product(g) * self._tt[None, :]}


class Tsz(Term):
    name = "tsz"

    def __init__(self, layout, nu0, shape):
        super().__init__(layout)
        if abs(float(sed.tsz_f(nu0))) < 0.1:
            raise UserError(f"nuisance.reference_ghz = {nu0:g}: the tSZ spectrum is (nearly) zero there "
                            "(null at 217 GHz); choose another reference frequency")
        g = np.array([sed.tsz_thermo(c.nu_ghz, _bandpass(c)) for c in layout.channels]) / float(sed.tsz_f(nu0))
        f = layout.avg(shape) * layout.mask(("TT",)) * layout.pair_product(g[None, :])[0]
        self._fixed = {"tsz_amp": f[None, :]}
        self.params = {"tsz_amp": 0.0}
        self.amplitudes = ("tsz_amp",)

    def _templates(self, v):
        return self._fixed


class Ksz(Term):
    name = "ksz"

    def __init__(self, layout, shape):
        super().__init__(layout)
        self._fixed = {"ksz_amp": (layout.avg(shape) * layout.mask(("TT",)))[None, :]}
        self.params = {"ksz_amp": 0.0}
        self.amplitudes = ("ksz_amp",)

    def _templates(self, v):
        return self._fixed


class Dust(Term):
    name = "dust"

    def __init__(self, layout, nu0, kinds):
        super().__init__(layout)
        self.nu0 = nu0
        self.kinds = tuple(k for k in kinds if k in set(layout.kind))
        self._masks = {k: layout.mask((k,)) for k in self.kinds}
        amps = {f"dust_{k.lower()}_amp": 0.0 for k in self.kinds}
        self.params = {**amps, "dust_ell_index": -2.42, "dust_beta": 1.5, "dust_temp": 19.6}
        self.amplitudes = tuple(amps)
        self.ranges = {"dust_ell_index": ELL_INDEX_RANGE, "dust_beta": sed.BETA_RANGE, "dust_temp": sed.TD_RANGE}

    def _templates(self, v):
        shape = self.layout.avg(power_law(self.layout.ell, PIVOT_DUST, _col(v, "dust_ell_index") + 2.0))
        g = self.layout.sed(sed.mbb, (_col(v, "dust_beta"), _col(v, "dust_temp")), self.nu0)
        base = shape * self.layout.pair_product(g)
        return {f"dust_{k.lower()}_amp": base * self._masks[k][None, :] for k in self.kinds}


def _bandpass(ch):
    if ch.bandpass_nu_ghz is None:
        return None
    return (ch.bandpass_nu_ghz, ch.bandpass_weight)


def read_shape(path: str, key: str, where: str) -> tuple[np.ndarray, np.ndarray]:
    """An ℓ-shape template from a text file of two columns (ℓ, D_ℓ shape), '#' comments: data, never code.
    One line naming the file and the problem for a missing file, bad numbers, unsorted or non-finite ℓ."""
    try:
        arr = np.loadtxt(path, comments="#", ndmin=2)
    except OSError as err:
        raise UserError(f"{where}: '{key}' = {path}: cannot read ({err.strerror or err})") from None
    except ValueError as err:
        raise UserError(f"{where}: '{key}' = {path}: not a table of numbers ({str(err).splitlines()[0]})") from None
    if arr.shape[1] != 2 or arr.shape[0] < 2:
        raise UserError(f"{where}: '{key}' = {path}: needs two columns (ℓ, D_ℓ shape) and ≥ 2 rows, "
                        f"found shape {arr.shape}")
    ell, shape = arr[:, 0], arr[:, 1]
    if not (np.all(np.isfinite(arr)) and np.all(np.diff(ell) > 0)):
        raise UserError(f"{where}: '{key}' = {path}: ℓ must increase and every value be finite")
    return ell, shape


def shape_on(ell_grid, table, pivot, key, where) -> np.ndarray:
    """A template (ℓ, shape) on the window grid, normalised to 1 at ``pivot``; refused if it does not cover
    the grid or the pivot, or vanishes at the pivot."""
    ell, shape = table
    lo, hi = float(np.min(ell_grid)), float(np.max(ell_grid))
    if ell[0] > lo or ell[-1] < hi or not ell[0] <= pivot <= ell[-1]:
        raise UserError(f"{where}: '{key}' covers ℓ {ell[0]:g}–{ell[-1]:g}; it must cover the dataset's "
                        f"windows (ℓ {lo:g}–{hi:g}) and the pivot ℓ = {pivot:g}")
    norm = float(np.interp(pivot, ell, shape))
    if not norm > 0:
        raise UserError(f"{where}: '{key}' is not positive at the pivot ℓ = {pivot:g}")
    return np.interp(np.asarray(ell_grid, float), ell, shape) / norm
