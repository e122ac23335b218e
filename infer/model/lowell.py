"""The non-Gaussian band-power likelihood of the lowest multipoles (Hamimeche & Lewis 2008, PRD 77, 103013).

At low ℓ a band power is a sum of few squared modes and its distribution is skewed (for one field on the
full sky, (2ℓ+1) Ĉ_ℓ / C_ℓ is χ² with 2ℓ+1 degrees of freedom: common knowledge of the trade). Hamimeche
& Lewis replace the Gaussian in Ĉ by a Gaussian in a transformed variable. Per band, with Ĉ the observed
and C the model spectrum matrix, both including the noise N, and C_f the fiducial (also with noise):

    X = C_f^{1/2} g(C^{-1/2} Ĉ C^{-1/2}) C_f^{1/2},   g(x) = sign(x − 1) √(2 (x − ln x − 1))

(g applied to the eigenvalues of the symmetric matrix), and

    −2 ln L = vecp(X)ᵀ M_f⁻¹ vecp(X)

with vecp the band's independent elements in the dataset's own order and M_f the covariance of those
elements at the fiducial, which is the dataset's covariance block of the low-ℓ bands. Where TT, TE and EE
of one band (same ℓ range and channel pair) are all present, the 2×2 (T, E) matrix form is used; a band of
a single auto spectrum (TT, EE or BB alone) uses the scalar form. A TE band without its TT and EE partners
is refused. g(x) ≈ x − 1 near x = 1, so for Ĉ near C the form reduces to the Gaussian with covariance
M_f; at high ℓ (many modes) the two agree.

Exactness: for one field on the full sky, with M_f = 2 C_f² / (2ℓ+1), −2 ln L_HL = (2ℓ+1)(x − ln x − 1),
x = Ĉ/C, whatever C_f is: this equals the exact χ² likelihood of Ĉ up to a constant independent of C
(Hamimeche & Lewis 2008 §II). With a dataset's covariance (cut sky, binning) it is the paper's
approximation, accurate to second order in C − C_f when C_f is near the truth.

Assumptions: the band powers of the covered bands (ℓ_hi ≤ ``low_ell_max``) are unbiased power estimates
(noise bias not subtracted would be an error: ``noise`` is added to the model, the fiducial and the data
alike as the paper prescribes — the data's noise bias is assumed already removed in ``value``); Ĉ, C and
C_f share one unit per band (D_ℓ or C_ℓ scaling of a band cancels in C^{-1/2} Ĉ C^{-1/2}). The
cross-covariance between the covered bands and the rest is ignored (the low-ℓ block is treated as
independent); `cross_correlation` measures how large it is.

Run file: ``[likelihood]`` with ``low_ell = "gaussian" | "hamimeche-lewis"`` (default "gaussian") and
``low_ell_max`` (integer, 2 … 200; default 29), read by `read_section`.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg

from infer import validate
from infer.errors import UserError

#: Values of ``[likelihood] low_ell``.
LOW_ELL_FORMS = ("gaussian", "hamimeche-lewis")
#: Range and default of ``[likelihood] low_ell_max``.
LOW_ELL_MAX_RANGE, LOW_ELL_MAX_DEFAULT = (2, 200), 29
#: Largest |correlation coefficient| between the covered bands and the rest before a warning.
CROSS_WARN = 0.1
KEYS = {"low_ell", "low_ell_max"}


@dataclass(frozen=True)
class LikelihoodOptions:
    """The validated ``[likelihood]`` section."""

    low_ell: str = "gaussian"
    low_ell_max: int = LOW_ELL_MAX_DEFAULT


def read_section(path, table, base, theory, parameters) -> LikelihoodOptions:
    """The ``[likelihood]`` reader registered in `infer.config.SECTION_READERS` (types, ranges and choices
    checked here, one line naming the file and key)."""
    validate.check_keys(path, "likelihood", table, KEYS)
    form = validate.choice(path, "likelihood.low_ell", table.get("low_ell", "gaussian"), LOW_ELL_FORMS)
    lmax = validate.number(path, "likelihood.low_ell_max", table.get("low_ell_max", LOW_ELL_MAX_DEFAULT),
                           integer=True, low=LOW_ELL_MAX_RANGE[0], high=LOW_ELL_MAX_RANGE[1])
    return LikelihoodOptions(form, int(lmax))


def g(x: np.ndarray) -> np.ndarray:
    """sign(x − 1) √(2 (x − ln x − 1)) for x > 0 (Hamimeche & Lewis 2008, eq. 10)."""
    x = np.asarray(x, float)
    return np.sign(x - 1.0) * np.sqrt(np.maximum(2.0 * (x - np.log(x) - 1.0), 0.0))


def _sym_fn(a: np.ndarray, fn) -> np.ndarray:
    w, v = np.linalg.eigh(a)
    return (v * fn(w)) @ v.T


def _sqrt_psd(a: np.ndarray) -> np.ndarray:
    return _sym_fn(a, np.sqrt)


class HamimecheLewis:
    """−2 ln L of the covered bands of a dataset in the Hamimeche–Lewis form (module docstring).

    ``rows``: indices of the covered bands in the dataset; ``data`` a `BandPowers` with ``noise`` and
    ``fiducial``. Set-up groups the bands (matrix or scalar form), factorises M_f once and refuses in one
    line a band whose noise or fiducial is missing — before any theory call.
    """

    def __init__(self, data, rows: np.ndarray, where: str = "[likelihood]"):
        rows = np.asarray(rows, int)
        if rows.size == 0:
            raise UserError(f"{where}: no band lies at or below low_ell_max")
        kind = np.asarray(data.kind).astype(str)
        pair = np.asarray(getattr(data, "pair", np.full(len(kind), "")))
        noise = np.asarray(getattr(data, "noise", np.full(len(kind), np.nan)), float)
        fid = np.asarray(getattr(data, "fiducial", np.full(len(kind), np.nan)), float)
        for what, arr in (("noise", noise), ("fiducial", fid)):
            bad = [int(b) for b in rows if not np.isfinite(arr[b])]
            if bad:
                b = bad[0]
                raise UserError(f"{data.source}: {where} low_ell = \"hamimeche-lewis\" needs the {what} "
                                f"spectrum of every band with ℓ ≤ low_ell_max; band {b} ({kind[b]} ℓ "
                                f"{int(data.ell_lo[b])}–{int(data.ell_hi[b])}) has none")
        self.rows = rows
        pos = {int(b): i for i, b in enumerate(rows)}
        groups: dict[tuple, dict[str, int]] = {}
        for b in rows:
            key = (int(data.ell_lo[b]), int(data.ell_hi[b]), str(pair[b]))
            groups.setdefault(key, {})[kind[b]] = pos[int(b)]
        self.matrix, self.scalar = [], []      # (i_TT, i_EE, i_TE) positions; scalar positions
        for key, members in groups.items():
            if {"TT", "TE", "EE"} <= set(members):
                self.matrix.append((members["TT"], members["EE"], members["TE"]))
                rest = set(members) - {"TT", "TE", "EE"}
            else:
                rest = set(members)
            for k in sorted(rest):
                if k == "TE":
                    raise UserError(f"{data.source}: {where} a TE band (ℓ {key[0]}–{key[1]}) needs TT and EE "
                                    "bands of the same ℓ range and pair for the Hamimeche–Lewis matrix form")
                self.scalar.append(members[k])
        self.scalar = np.asarray(self.scalar, int)
        self.value = np.asarray(data.value, float)[rows]
        self.noise = noise[rows]
        self.fid = fid[rows] + self.noise
        if np.any(self.fid[self.scalar] <= 0):
            raise UserError(f"{data.source}: {where} the fiducial plus noise must be positive for auto spectra")
        cov = np.asarray(data.covariance, float)
        self._chol = linalg.cho_factor(cov[np.ix_(rows, rows)], lower=True)
        self._lognorm = float(np.sum(np.log(np.diag(self._chol[0]))) + 0.5 * rows.size * math.log(2 * math.pi))
        self._fid_sqrt = [_sqrt_psd(self._mat(self.fid, t)) for t in self.matrix]

    @staticmethod
    def _mat(v, t):
        i_tt, i_ee, i_te = t
        return np.array([[v[i_tt], v[i_te]], [v[i_te], v[i_ee]]])

    @property
    def lognorm(self) -> float:
        """½ ln det(2π M_f), so that ln L = −½ (−2 ln L part) − lognorm, as the Gaussian's."""
        return self._lognorm

    def vector(self, model: np.ndarray) -> np.ndarray | None:
        """vecp(X) of the covered bands, in the dataset's order, for model band powers ``model`` of those
        bands (N_low,); None when some C or Ĉ is not positive."""
        c = np.asarray(model, float) + self.noise
        d = self.value + self.noise
        x = np.empty(self.rows.size)
        s = self.scalar
        if s.size:
            if np.any(c[s] <= 0) or np.any(d[s] <= 0):
                return None
            x[s] = self.fid[s] * g(d[s] / c[s])
        for t, sf in zip(self.matrix, self._fid_sqrt):
            cm, dm = self._mat(c, t), self._mat(d, t)
            wc, vc = np.linalg.eigh(cm)
            if wc.min() <= 0:
                return None
            ci = (vc / np.sqrt(wc)) @ vc.T
            inner = ci @ dm @ ci
            w, v = np.linalg.eigh(0.5 * (inner + inner.T))
            if w.min() <= 0:
                return None
            xm = sf @ ((v * g(w)) @ v.T) @ sf
            x[t[0]], x[t[1]], x[t[2]] = xm[0, 0], xm[1, 1], xm[0, 1]
        return x

    def chi2(self, model: np.ndarray) -> float:
        """−2 ln L + const = vecp(X)ᵀ M_f⁻¹ vecp(X) (∞ where the model is not positive)."""
        x = self.vector(model)
        if x is None:
            return math.inf
        return float(x @ linalg.cho_solve(self._chol, x))


def covered_rows(data, low_ell_max: int) -> np.ndarray:
    """Indices of the bands lying wholly at or below ``low_ell_max``."""
    return np.flatnonzero(np.asarray(data.ell_hi) <= int(low_ell_max))


def cross_correlation(covariance: np.ndarray, rows: np.ndarray) -> float:
    """Largest |correlation coefficient| between the covered bands ``rows`` and the others (0 if none):
    the Hamimeche–Lewis block is treated as independent of the rest, which this number should justify."""
    cov = np.asarray(covariance, float)
    rest = np.setdiff1d(np.arange(cov.shape[0]), rows)
    if rest.size == 0 or np.size(rows) == 0:
        return 0.0
    sd = np.sqrt(np.diag(cov))
    corr = cov[np.ix_(rows, rest)] / np.outer(sd[rows], sd[rest])
    return float(np.max(np.abs(corr)))


__all__ = ["LOW_ELL_FORMS", "LikelihoodOptions", "HamimecheLewis", "covered_rows", "cross_correlation",
           "g", "read_section"]
