"""The band-power dataset type: `BandPowers` in the working units, and its cuts.

A dataset is what an experiment hands to a likelihood: N band powers grouped by spectrum kind
(TT, TE, EE, BB), each with its multipole range, a bandpower window function and one N×N covariance
across all bands and kinds. The model prediction of band b is the window-weighted sum of the theory
spectrum (bandpower window functions: Knox 1999, Phys. Rev. D 60, 103516 — cited from memory),

    B_b = Σ_ℓ W_bℓ X_ℓ ,

where X_ℓ is the spectrum the file's units declare (D_ℓ = ℓ(ℓ+1)C_ℓ/2π or C_ℓ). A band power is a
weighted mean of the spectrum, so each band's weights sum to one in the declared units.

The working unit of the whole code is D_ℓ in μK². In a `BandPowers` (built only by
`infer.data.checks.assemble`, which converts once):

* ``value`` is in μK² and ``covariance`` in μK⁴;
* ``window`` always acts on D_ℓ in μK²: for C_ℓ data the weights are re-expressed exactly as
  W'_bℓ = W_bℓ · 2π / (ℓ(ℓ+1)), so ``window @ D_ℓ`` equals the C_ℓ-type band power in μK² — no
  approximation at ℓ_eff is made;
* ``to_dl`` turns ``value`` into a D_ℓ-type number at ℓ_eff for plots only: 1 for D_ℓ data and
  ℓ_eff(ℓ_eff+1)/2π for C_ℓ data.

Declared units (`UNITS`): ``Dl_uK2``, ``Dl_K2``, ``Cl_uK2``, ``Cl_K2`` (spectrum type, then the unit
of the band powers). No dataset may name a multipole above `MAX_ELL`.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np

from infer.errors import UserError
from infer.theory.base import KINDS

#: Declared units → (spectrum is C_ℓ-type, factor turning the declared unit into μK²).
UNITS: dict[str, tuple[bool, float]] = {
    "Dl_uK2": (False, 1.0),
    "Dl_K2": (False, 1e12),
    "Cl_uK2": (True, 1.0),
    "Cl_K2": (True, 1e12),
}

#: Largest multipole a dataset, a cut or an experiment may name. Beyond ℓ ≈ 10⁴ the CMB is
#: dominated by foregrounds and no Boltzmann code is run; 100 000 leaves a wide margin while keeping
#: every per-ℓ array small (a band's top-hat window row is at most 0.8 MB).
MAX_ELL = 100_000


def frozen(arr) -> np.ndarray:
    """A read-only copy."""
    arr = np.array(arr, copy=True)
    arr.setflags(write=False)
    return arr


def last_support(window: np.ndarray, window_ell: np.ndarray) -> np.ndarray:
    """Largest ℓ with non-zero weight, per band (-1 for an all-zero row)."""
    nz = window != 0
    last = window.shape[1] - 1 - np.argmax(nz[:, ::-1], axis=1)
    return np.where(nz.any(axis=1), window_ell[last], -1)


def check_reach(window, window_ell, kind, theory_ell_max: int, label: str) -> None:
    """Raise `UserError` (``label`` first) if some band's window reaches beyond ``theory_ell_max``."""
    reach = last_support(np.asarray(window), np.asarray(window_ell))
    over = np.flatnonzero(reach > theory_ell_max)
    if over.size:
        b = int(over[0])
        raise UserError(f"{label}: band {b} ({kind[b]}) needs ℓ up to {int(reach[b])} but the theory "
                        f"is asked for ℓ ≤ {theory_ell_max}")


#: A channel name: 1–32 letters, digits, '.', '_', '-', '+', never a lowercase 'x' (the pair separator).
CHANNEL_NAME = re.compile(r"[A-Za-wyz0-9_.+-]{1,32}")


def pair_label(c1: str, c2: str) -> str:
    """"90x150" for channels "90" and "150"; "" for the single unnamed channel of a version-1 file."""
    return "" if c1 == "" and c2 == "" else f"{c1}x{c2}"


@dataclass(frozen=True, eq=False)
class Channel:
    """One frequency channel: centre frequency (GHz; None only for the unnamed "" channel) and an optional
    bandpass (relative transmission as given, any normalisation; ascending ν > 0, weights ≥ 0, ∫ > 0)."""

    name: str
    nu_ghz: float | None = None
    bandpass_nu_ghz: np.ndarray | None = None
    bandpass_weight: np.ndarray | None = None


@dataclass(frozen=True, eq=False, repr=False)
class BandPowers:
    """Band powers in the working units (see the module docstring); arrays are read-only."""

    source: str                 # path(s) it was read from, for messages
    experiment: str             # free-text name of the experiment
    kind: np.ndarray            # (N,) str; bands grouped by kind
    ell_lo: np.ndarray          # (N,) int, first multipole (inclusive)
    ell_hi: np.ndarray          # (N,) int, last multipole (inclusive)
    ell_eff: np.ndarray         # (N,) float
    value: np.ndarray           # (N,) float, μK² (D_ℓ-type or C_ℓ-type as declared)
    covariance: np.ndarray      # (N, N) μK⁴
    window_ell: np.ndarray      # (L,) int, contiguous ℓ grid of the windows
    window: np.ndarray          # (N, L): model band b = window[b] @ D_ℓ(window_ell), D_ℓ in μK²
    to_dl: np.ndarray           # (N,) factor turning value into D_ℓ μK² at ell_eff (plots only)
    units: str                  # units as declared: one of UNITS
    sha256: str                 # hex digest of the file bytes (plus the covariance file, plain route)
    channel_1: np.ndarray = None   # (N,) str, channel of the first map (T of TE); "" for version 1
    channel_2: np.ndarray = None   # (N,) str, channel of the second map (E of TE)
    channels: tuple = None         # tuple of Channel, file order
    beam_modes: np.ndarray = None  # (K, N) fractional model change per unit beam-mode amplitude
    noise: np.ndarray = None       # (N,) like value; NaN where absent
    fiducial: np.ndarray = None    # (N,) like value; NaN where absent

    def __post_init__(self):
        n = int(np.shape(self.kind)[0])
        defaults = {"channel_1": frozen(np.full(n, "", dtype="<U32")),
                    "channel_2": frozen(np.full(n, "", dtype="<U32")),
                    "channels": (Channel(""),), "beam_modes": frozen(np.zeros((0, n))),
                    "noise": frozen(np.full(n, np.nan)), "fiducial": frozen(np.full(n, np.nan))}
        for name, default in defaults.items():
            if getattr(self, name) is None:
                object.__setattr__(self, name, default)

    def __len__(self) -> int:
        return int(self.kind.shape[0])

    def __repr__(self) -> str:
        return (f"BandPowers({self.experiment!r}, {len(self)} bands {'/'.join(self.spectra)}, "
                f"ℓ {int(self.ell_lo.min())}–{int(self.ell_hi.max())}, units {self.units}, "
                f"from {self.source})")

    @property
    def spectra(self) -> tuple[str, ...]:
        """Kinds present, in file order."""
        return tuple(dict.fromkeys(str(k) for k in self.kind))

    @property
    def pair(self) -> np.ndarray:
        """(N,) pair labels, "90x150" ("" for a single-channel version-1 file)."""
        return np.array([pair_label(a, b) for a, b in zip(self.channel_1.tolist(), self.channel_2.tolist())],
                        dtype="<U65")

    @property
    def pairs(self) -> tuple[str, ...]:
        """Pair labels present, in file order."""
        return tuple(dict.fromkeys(self.pair.tolist()))

    @property
    def ell_max_needed(self) -> int:
        """Largest ℓ with non-zero window weight in any band."""
        cols = np.flatnonzero((self.window != 0).any(axis=0))
        return int(self.window_ell[cols[-1]])

    def check_theory_ell_max(self, theory_ell_max: int) -> None:
        """Raise `UserError` if some band's window reaches beyond ``theory_ell_max``."""
        check_reach(self.window, self.window_ell, self.kind, int(theory_ell_max),
                    f"{self.source}: windows")

    def cut(self, spectra=None, pairs=None, ell_min=None, ell_max=None, ell_ranges=None) -> "BandPowers":
        """Keep whole bands of ``spectra`` and ``pairs`` lying inside their ℓ range, with their
        sub-covariance, beam-mode columns, noise and fiducial. A band's range is the most specific of
        ``ell_ranges["KIND PAIR"]``, ``ell_ranges["KIND"]``, then [ell_min, ell_max]. The window grid is
        trimmed to the support of the kept bands."""
        keep = np.ones(len(self), dtype=bool)
        what = []
        if spectra is not None:
            if isinstance(spectra, str):
                spectra = (spectra,)
            spectra = tuple(spectra)
            unknown = [s for s in spectra if s not in KINDS]
            if unknown:
                raise UserError(f"{self.source}: unknown spectrum {unknown[0]!r} in the cut "
                                f"(known: {', '.join(KINDS)})")
            absent = [s for s in spectra if s not in self.spectra]
            if absent:
                raise UserError(f"{self.source}: the dataset has no {absent[0]} bands "
                                f"(it has {', '.join(self.spectra)})")
            keep &= np.isin(self.kind, spectra)
            what.append("spectra " + "/".join(spectra))
        pair = self.pair
        if pairs is not None:
            if isinstance(pairs, str):
                pairs = (pairs,)
            pairs = tuple(pairs)
            absent = [p for p in pairs if p not in self.pairs]
            if absent:
                raise UserError(f"{self.source}: dataset.pairs: {absent[0]!r} is not a frequency pair of "
                                f"the dataset (it has {', '.join(self.pairs) or 'one unnamed channel'})")
            keep &= np.isin(pair, pairs)
            what.append("pairs " + "/".join(pairs))
        lo = np.full(len(self), 0 if ell_min is None else int(ell_min))
        hi = np.full(len(self), MAX_ELL if ell_max is None else int(ell_max))
        if ell_min is not None:
            what.append(f"ℓ ≥ {int(ell_min)}")
        if ell_max is not None:
            what.append(f"ℓ ≤ {int(ell_max)}")
        ranges = dict(ell_ranges or {})
        for key in sorted(ranges, key=lambda k: len(str(k).split())):   # kinds first, then kind+pair
            parts = str(key).split()
            sel = self.kind == parts[0]
            if parts[0] not in self.spectra:
                raise UserError(f"{self.source}: dataset.ell_ranges: {key!r}: the dataset has no "
                                f"{parts[0]} bands (it has {', '.join(self.spectra)})")
            if len(parts) == 2:
                if parts[1] not in self.pairs:
                    raise UserError(f"{self.source}: dataset.ell_ranges: {key!r}: {parts[1]!r} is not a "
                                    f"frequency pair of the dataset (it has {', '.join(self.pairs)})")
                sel &= pair == parts[1]
            a, b = ranges[key]
            lo[sel], hi[sel] = int(a), int(b)
            what.append(f"{key} ℓ {int(a)}–{int(b)}")
        keep &= (self.ell_lo >= lo) & (self.ell_hi <= hi)
        if not keep.any():
            raise UserError(f"{self.source}: no band is left after the cut ({', '.join(what)})")
        idx = np.flatnonzero(keep)
        window = self.window[idx]
        cols = np.flatnonzero((window != 0).any(axis=0))
        span = slice(int(cols[0]), int(cols[-1]) + 1)
        used = set(self.channel_1[idx].tolist()) | set(self.channel_2[idx].tolist())
        return BandPowers(
            source=self.source, experiment=self.experiment,
            kind=frozen(self.kind[idx]), ell_lo=frozen(self.ell_lo[idx]),
            ell_hi=frozen(self.ell_hi[idx]), ell_eff=frozen(self.ell_eff[idx]),
            value=frozen(self.value[idx]), covariance=frozen(self.covariance[np.ix_(idx, idx)]),
            window_ell=frozen(self.window_ell[span]), window=frozen(window[:, span]),
            to_dl=frozen(self.to_dl[idx]), units=self.units, sha256=self.sha256,
            channel_1=frozen(self.channel_1[idx]), channel_2=frozen(self.channel_2[idx]),
            channels=tuple(c for c in self.channels if c.name in used),
            beam_modes=frozen(self.beam_modes[:, idx]), noise=frozen(self.noise[idx]),
            fiducial=frozen(self.fiducial[idx]))


__all__ = ["BandPowers", "Channel", "pair_label", "CHANNEL_NAME", "UNITS", "MAX_ELL", "check_reach", "frozen"]
