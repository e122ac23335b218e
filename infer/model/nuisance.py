"""Nuisance terms of the band-power model: what the sky and the instrument add to the CMB.

    m_b = s_b(θ) · ( B_b + F_b(θ) ),      B_b = Σ_ℓ W_bℓ D_ℓ^{X_b}

with B the binned theory, F the sum of the additive foreground terms (`infer.model.foregrounds`) and s the
multiplicative instrument factor (`infer.model.instrument`: calibrations, polarisation efficiencies, beam
modes). Each nuisance parameter is a parameter of the run when it appears under ``[parameters]``
(sampled, fixed, or marginalised analytically with ``analytic = true``); otherwise it sits at its
default, which leaves the model unchanged. Always available:

* ``calibration`` (default 1) — a multiplicative map calibration c: band powers scale as c², since a
  power spectrum is quadratic in the map (common practice).
* ``fg_tt_amp`` (default 0, μK²) — residual Poisson power in every TT band, D_ℓ = A (ℓ/3000)² (a white
  C_ℓ; common practice, e.g. Dunkley et al. 2013, JCAP 07, 025; cited from memory).
* ``cal_<channel>``, ``poleff_<channel>``, ``beam_<k>`` when the dataset has named channels / beam modes.

The multi-frequency foreground terms are switched on by the run file's ``[nuisance]`` section (read by
`read_section`; keys in `KEYS`): ``terms = ["poisson", "cib", "tsz", "ksz", "dust"]`` (any subset),
``poisson = "pairs" | "sed"``, ``reference_ghz`` (default 150), ``dust_reference_ghz`` (default 353),
``dust_spectra`` (default TT, TE, EE) and the template files ``tsz_shape`` / ``ksz_shape`` (two columns:
ℓ, D_ℓ shape; normalised here at ℓ = 3000).

Everything is vectorised over points (values (n,), bands (n, N)), so the surrogate engine applies the
same exact nuisance model as a single exact call.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np

from infer import validate
from infer.errors import UserError
from infer.model import foregrounds as fgs
from infer.model.instrument import CALIBRATION, Instrument

LEGACY_POISSON = "fg_tt_amp"
TERMS = ("poisson", "cib", "tsz", "ksz", "dust")
POISSON_FORMS = ("pairs", "sed")
KEYS = {"terms", "poisson", "reference_ghz", "dust_reference_ghz", "dust_spectra", "tsz_shape", "ksz_shape"}
#: The nuisance parameters of every dataset and their defaults (others depend on the dataset and section).
NUISANCE = {CALIBRATION: 1.0, LEGACY_POISSON: 0.0}


@dataclass(frozen=True)
class NuisanceOptions:
    """The validated ``[nuisance]`` section; template files as (path, sha256)."""

    terms: tuple[str, ...] = ()
    poisson: str = "pairs"
    reference_ghz: float = 150.0
    dust_reference_ghz: float = 353.0
    dust_spectra: tuple[str, ...] = ("TT", "TE", "EE")
    tsz_shape: tuple[str, str] | None = None
    ksz_shape: tuple[str, str] | None = None


def read_section(path, table, base, theory, parameters) -> NuisanceOptions:
    """The ``[nuisance]`` reader of `infer.config.SECTION_READERS`: types, choices and files checked, one
    line naming the file and the key."""
    from infer.config import _resolve
    validate.check_keys(path, "nuisance", table, KEYS)
    terms = table.get("terms", [])
    if not isinstance(terms, list) or not all(isinstance(t, str) for t in terms):
        raise UserError(f"{path}: 'nuisance.terms' must be a list of names ({', '.join(TERMS)}), "
                        f"got {validate.show(terms)}")
    for t in terms:
        if t not in TERMS:
            raise UserError(f"{path}: 'nuisance.terms': unknown term {t!r} (known: {', '.join(TERMS)})")
    if len(set(terms)) != len(terms):
        raise UserError(f"{path}: 'nuisance.terms' names a term twice")
    form = validate.choice(path, "nuisance.poisson", table.get("poisson", "pairs"), POISSON_FORMS)
    ref = float(validate.number(path, "nuisance.reference_ghz", table.get("reference_ghz", 150.0),
                                low=1.0, high=3000.0))
    dref = float(validate.number(path, "nuisance.dust_reference_ghz", table.get("dust_reference_ghz", 353.0),
                                 low=1.0, high=3000.0))
    spectra = table.get("dust_spectra", ["TT", "TE", "EE"])
    if not (isinstance(spectra, list) and spectra and all(s in ("TT", "TE", "EE", "BB") for s in spectra)):
        raise UserError(f"{path}: 'nuisance.dust_spectra' must be a non-empty list of TT, TE, EE, BB, "
                        f"got {validate.show(spectra)}")
    files = {}
    for key, term in (("tsz_shape", "tsz"), ("ksz_shape", "ksz")):
        if term in terms and key not in table:
            raise UserError(f"{path}: 'nuisance.terms' has {term!r}: give its ℓ-shape file as 'nuisance.{key}'")
        if key in table:
            file = _resolve(base, table[key], path, f"nuisance.{key}")
            fgs.read_shape(file, f"nuisance.{key}", path)
            files[key] = (file, _digest(file))
    return NuisanceOptions(tuple(terms), form, ref, dref, tuple(spectra), files.get("tsz_shape"),
                           files.get("ksz_shape"))


def _digest(file) -> str:
    with open(file, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


class NuisanceModel:
    """The nuisance terms for one dataset: templates averaged over its windows, applied per point (terms
    whose amplitudes are all zero, and unit gains, cost nothing)."""

    def __init__(self, data, windows, window_ell, options: NuisanceOptions | None = None,
                 where: str = "[nuisance]"):
        options = options or NuisanceOptions()
        self.layout = layout = fgs.Layout(data, windows, window_ell)
        self.instrument = Instrument(layout, data.beam_modes)
        self.terms: list[fgs.Term] = []
        if options.terms and not (layout.named and all(c.nu_ghz for c in layout.channels)):
            raise UserError(f"{where}: foreground terms need named frequency channels, but the dataset "
                            f"{data.source} has none (a single-channel version-1 file?)")
        self.terms.append(_Legacy(layout))
        for name in options.terms:
            self.terms.append(self._term(name, options, layout, where))
        self.defaults = dict(self.instrument.params)
        for t in self.terms:
            for k, v in t.params.items():
                if k in self.defaults:
                    raise UserError(f"{where}: parameter {k} is defined by two terms")
                self.defaults[k] = v
        self.amplitudes = tuple(a for t in self.terms for a in t.amplitudes)
        self.linear = set(self.amplitudes) | set(self.instrument.beams)
        self.ranges = {k: r for t in self.terms for k, r in t.ranges.items()}
        self._default_one = {k: np.full(1, v) for k, v in self.defaults.items()}

    @staticmethod
    def _term(name, o: NuisanceOptions, layout, where):
        if name == "poisson":
            return fgs.PoissonPairs(layout) if o.poisson == "pairs" else fgs.PoissonSed(layout, o.reference_ghz)
        if name == "cib":
            return fgs.Cib(layout, o.reference_ghz)
        if name == "dust":
            return fgs.Dust(layout, o.dust_reference_ghz, o.dust_spectra)
        file, digest = o.tsz_shape if name == "tsz" else o.ksz_shape
        if _digest(file) != digest:
            raise UserError(f"{where}: {file} changed since the run file was read")
        table = fgs.read_shape(file, f"nuisance.{name}_shape", where)
        shape = fgs.shape_on(layout.ell, table, fgs.PIVOT_EXTRAGALACTIC, f"nuisance.{name}_shape", where)
        return fgs.Tsz(layout, o.reference_ghz, shape) if name == "tsz" else fgs.Ksz(layout, shape)

    # -- values ------------------------------------------------------------------------------------------
    def values(self, given: dict, n: int | None = None) -> "Values":
        """Every parameter as an array (n,): the given values (scalars or arrays), defaults elsewhere. The
        result remembers which were given: only those can move the model away from its neutral form."""
        if n is None:
            sizes = [np.size(v) for v in given.values()]
            n = max(sizes) if sizes else 1
        if n == 1:
            out = Values(self._default_one)
        else:
            out = Values({k: np.full(n, v) for k, v in self.defaults.items()})
        for k, v in given.items():
            if k in out:
                out[k] = np.full(n, float(v)) if isinstance(v, (float, int)) else \
                    np.broadcast_to(np.asarray(v, float), (n,))
        out.given = frozenset(given) & set(self.defaults)
        return out

    # -- the model ---------------------------------------------------------------------------------------
    def foreground(self, v, skip=()) -> np.ndarray | float:
        """Σ of the additive terms (n, N), leaving out the amplitudes in ``skip``; 0.0 when none is live."""
        total = 0.0
        given = _given(v)
        for t in self.terms:
            use = [a for a in t.amplitudes if a in given and a not in skip]
            if use:
                tpl = t.templates(v)
                for name in use:
                    total = total + np.asarray(v[name], float)[:, None] * tpl[name]
        return total

    def scale(self, v, skip=()) -> np.ndarray:
        """(n, N) instrument factor s(θ), leaving out the beam modes in ``skip``."""
        given = _given(v)
        s = self.instrument.gains(v, given)
        beam = self.instrument.beam_factor(v, skip=set(skip) | (set(self.instrument.beams) - given))
        return s if beam is None else s * beam

    def apply_many(self, B: np.ndarray, v, skip=()) -> np.ndarray:
        """m = s ⊙ (B + F) for bands B (n, N); parameters in ``skip`` left out (analytic ones)."""
        return self.scale(v, skip) * (np.atleast_2d(B) + self.foreground(v, skip))

    def undo_many(self, m: np.ndarray, v, skip=()) -> np.ndarray:
        """The binned theory B from model bands m (n, N): the inverse of `apply_many`."""
        return np.atleast_2d(m) / self.scale(v, skip) - self.foreground(v, skip)

    def apply(self, bands: np.ndarray, values: dict | None = None) -> np.ndarray:
        """One point: ``bands`` (N,) the binned theory, ``values`` the given nuisance values."""
        return self.apply_many(bands[None, :], self.values(values or {}, 1))[0]

    def columns(self, B: np.ndarray, v, names) -> np.ndarray:
        """(n, N, K): ∂m/∂a for the linear parameters ``names`` (exact: m is linear in each of them, and
        in all of them jointly unless amplitudes and beam modes are mixed — refused by the caller)."""
        B = np.atleast_2d(B)
        beams = [n for n in names if n in self.instrument.beams]
        amps = [n for n in names if n not in beams]
        s = self.scale(v, skip=names)
        cols = {}
        for t in self.terms:
            if any(a in amps for a in t.amplitudes):
                tpl = t.templates(v)
                cols.update({a: s * tpl[a] for a in t.amplitudes if a in amps})
        if beams:
            base = self.instrument.gains(v, _given(v)) * (B + self.foreground(v, skip=names))
            for name in beams:
                cols[name] = base * self.instrument.modes[self.instrument.beams.index(name)][None, :]
        n = len(B)
        return np.stack([np.broadcast_to(cols[k], (n, self.layout.n)) for k in names], axis=2)


_TEX = {"calibration": "c", LEGACY_POISSON: r"A^{TT}_{\rm PS}", "ps_amp": r"A_{\rm PS}", "ps_index": r"\alpha_{\rm PS}",
        "cib_amp": r"A_{\rm CIB}", "cib_ell_index": r"n_{\rm CIB}", "cib_beta": r"\beta_{\rm CIB}",
        "cib_temp": r"T_{\rm CIB}", "tsz_amp": r"A_{\rm tSZ}", "ksz_amp": r"A_{\rm kSZ}",
        "dust_ell_index": r"\alpha_{\rm d}", "dust_beta": r"\beta_{\rm d}", "dust_temp": r"T_{\rm d}"}


def tex_label(name: str) -> str | None:
    """A LaTeX label for a nuisance parameter's name (None for names that are not nuisance names)."""
    if name in _TEX:
        return _TEX[name]
    for prefix, fmt in (("cal_", r"g_{{{}}}"), ("poleff_", r"\epsilon_{{{}}}"), ("beam_", r"\beta^{{\rm beam}}_{{{}}}")):
        if name.startswith(prefix):
            return fmt.format(name[len(prefix):].replace("_", "."))
    if name.startswith("ps_") and "x" in name:
        return r"A^{{\rm PS}}_{{{}}}".format(name[3:].replace("x", r"\times"))
    if name.startswith("dust_") and name.endswith("_amp"):
        return r"A^{{{}}}_{{\rm dust}}".format(name[5:-4].upper())
    return None


class Values(dict):
    """Parameter name → values (n,), with ``given``: the names given rather than defaulted."""

    given: frozenset = frozenset()


def _given(v) -> frozenset:
    return v.given if isinstance(v, Values) else frozenset(v)


class _Legacy(fgs.Term):
    """``fg_tt_amp``: Poisson power in every TT band (all pairs alike)."""

    name = "legacy"

    def __init__(self, layout):
        super().__init__(layout)
        self._fixed = {LEGACY_POISSON: (layout.avg((layout.ell / fgs.PIVOT_EXTRAGALACTIC) ** 2)
                                        * layout.mask(("TT",)))[None, :]}
        self.params = {LEGACY_POISSON: 0.0}
        self.amplitudes = (LEGACY_POISSON,)

    def _templates(self, v):
        return self._fixed
