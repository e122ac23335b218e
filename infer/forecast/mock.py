"""Mock band powers for an invented experiment, with the Gaussian (Knox) covariance.

An experiment is summarised by its sky fraction f_sky, a white-noise level σ_T (μK·arcmin) in
temperature, a Gaussian beam of full width at half maximum θ_FWHM, and a range of multipoles cut into
equal top-hat bins (Knox 1995, Phys. Rev. D 52, 4307). The noise spectrum, deconvolved by the beam, is

    N_ℓ = (σ θ_arcmin)² · exp(ℓ(ℓ+1) θ² / (8 ln 2)),   returned as D-type ℓ(ℓ+1) N_ℓ / 2π in μK²,

with σ in μK·rad and θ the FWHM in radians (B_ℓ² = exp(−ℓ(ℓ+1)θ²/(8 ln 2))). Polarisation noise is
σ_P = pol_noise_factor · σ_T (default √2: one set of detectors measuring both Stokes parameters —
common practice); the noise of TE is zero and BB has the EE noise.

Per multipole, the estimates of the spectra of Gaussian fields on a fraction f_sky of the sky have the
covariance (Knox 1995 for TT; the TT–TE–EE cross terms follow from the same Gaussian (Wick) argument,
e.g. Zaldarriaga, Spergel & Seljak 1997, ApJ 488, 1 — cited from memory)

    Cov(Ĉ^{XY}_ℓ, Ĉ^{WZ}_ℓ) = [M^{XW}_ℓ M^{YZ}_ℓ + M^{XZ}_ℓ M^{YW}_ℓ] / ((2ℓ+1) f_sky),
    M^{XY}_ℓ = C^{XY}_ℓ + N^{XY}_ℓ,

and estimates at different ℓ are independent. Since D_ℓ is C_ℓ times a factor common to all kinds at
fixed ℓ, the same formula holds with D_ℓ throughout, which is what is coded. Band b averages D̂_ℓ with
top-hat weights w_bℓ = 1/n over its n multipoles, so Cov(b, b') = Σ_ℓ w_bℓ w_b'ℓ Cov_ℓ.

Assumptions: isotropic white noise, a Gaussian beam known exactly, no T–B or E–B correlation (parity),
and the f_sky-scaled full-sky mode count (mode coupling of a cut sky is neglected). `simulate` draws
band powers from a multivariate Gaussian with this covariance — the Gaussian likelihood approximation;
the exact full-sky distribution of Ĉ_ℓ is Wishart (e.g. Percival & Brown 2006, MNRAS 372, 1104).

`fisher_matrix` is F_ij = ∂_i Bᵀ C⁻¹ ∂_j B for a parameter-independent covariance (Tegmark, Taylor &
Heavens 1997, ApJ 480, 22).

The experiment spec is a TOML file of our own layout (read with `tomllib`)::

    [experiment]        name, fsky, noise_uK_arcmin, beam_fwhm_arcmin, ell_min, ell_max, bin_width,
                        spectra, pol_noise_factor (optional)
    [fiducial]          omega_b, omega_c, H0, ln_As_1e10, n_s, tau (required), sum_mnu_eV, n_eff
    [mock]              seed, realise, output (relative to the spec file), description (all optional)
    [theory]            optional: the backend that makes the fiducial spectra, as in a run file
                        (default code = "camb", accuracy = "standard"); with code = "templates" the
                        [fiducial] table holds that model's amplitudes instead of ΛCDM parameters

Bins are [ell_min + k·w, ell_min + (k+1)·w − 1] for every k whose bin ends at or below ell_max; a last
partial bin is dropped.
"""
from __future__ import annotations

import math

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

import numpy as np
from scipy import linalg

from infer.data import bandpowers as dataset
from infer.errors import UserError
from infer.theory.base import KINDS, Spectra

#: Fiducial parameters every spec names, and the ones it may name.
FIDUCIAL_REQUIRED = ("omega_b", "omega_c", "H0", "ln_As_1e10", "n_s", "tau")
FIDUCIAL_OPTIONAL = ("sum_mnu_eV", "n_eff")

_EXPERIMENT_KEYS = ("name", "fsky", "noise_uK_arcmin", "beam_fwhm_arcmin", "ell_min", "ell_max",
                    "bin_width", "spectra", "pol_noise_factor")
_MOCK_KEYS = ("seed", "realise", "output", "description")
_TABLES = ("experiment", "fiducial", "mock", "theory")

_ARCMIN = math.pi / (180.0 * 60.0)   # one arcminute in radians

# Which fields a spectrum kind correlates.
_FIELDS = {"TT": ("T", "T"), "TE": ("T", "E"), "EE": ("E", "E"), "BB": ("B", "B")}


def _is_number(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _is_int(x) -> bool:
    return isinstance(x, int) and not isinstance(x, bool)


def _check_experiment(v: dict, where) -> None:
    """Check experiment values; ``where(key)`` prefixes messages (file and key, or object)."""
    if not isinstance(v["name"], str) or not v["name"].strip():
        raise UserError(f"{where('name')}: must be a non-empty string")
    for key in ("fsky", "noise_uK_arcmin", "beam_fwhm_arcmin", "pol_noise_factor"):
        if not _is_number(v[key]) or not math.isfinite(v[key]):
            raise UserError(f"{where(key)}: must be a finite number, got {v[key]!r}")
    if not 0.0 < v["fsky"] <= 1.0:
        raise UserError(f"{where('fsky')}: must be in (0, 1], got {v['fsky']!r}")
    for key in ("noise_uK_arcmin", "beam_fwhm_arcmin"):
        if v[key] < 0:
            raise UserError(f"{where(key)}: must be ≥ 0, got {v[key]!r}")
    if v["pol_noise_factor"] <= 0:
        raise UserError(f"{where('pol_noise_factor')}: must be > 0, got {v['pol_noise_factor']!r}")
    for key in ("ell_min", "ell_max", "bin_width"):
        if not _is_int(v[key]):
            raise UserError(f"{where(key)}: must be an integer, got {v[key]!r}")
    if v["ell_min"] < 2:
        raise UserError(f"{where('ell_min')}: must be ≥ 2, got {v['ell_min']}")
    if v["bin_width"] < 1:
        raise UserError(f"{where('bin_width')}: must be ≥ 1, got {v['bin_width']}")
    if v["ell_max"] - v["ell_min"] + 1 < v["bin_width"]:
        raise UserError(f"{where('ell_max')}: ℓ {v['ell_min']}–{v['ell_max']} holds no full bin of "
                        f"width {v['bin_width']}")
    spectra = v["spectra"]
    if isinstance(spectra, str) or not isinstance(spectra, (list, tuple)) or not spectra:
        raise UserError(f"{where('spectra')}: must be a non-empty list such as [\"TT\", \"TE\", \"EE\"]")
    for s in spectra:
        if s not in KINDS:
            raise UserError(f"{where('spectra')}: unknown spectrum {s!r} (known: {', '.join(KINDS)})")
    if len(set(spectra)) != len(spectra):
        raise UserError(f"{where('spectra')}: lists a spectrum twice")


@dataclass
class Experiment:
    """An invented CMB experiment (see the module docstring for the meaning of each field)."""

    name: str
    fsky: float
    noise_uK_arcmin: float
    beam_fwhm_arcmin: float
    ell_min: int
    ell_max: int
    bin_width: int
    spectra: tuple[str, ...]
    pol_noise_factor: float = math.sqrt(2.0)

    def __post_init__(self):
        self.spectra = tuple(self.spectra) if isinstance(self.spectra, (list, tuple)) else self.spectra
        _check_experiment(self.__dict__, lambda key: f"experiment {self.name!r}: {key}")

    @property
    def n_bins(self) -> int:
        """Bins per spectrum."""
        return (self.ell_max - self.ell_min + 1) // self.bin_width

    def bin_edges(self) -> tuple[np.ndarray, np.ndarray]:
        """(ell_lo, ell_hi) of the bins of one spectrum, inclusive."""
        lo = self.ell_min + self.bin_width * np.arange(self.n_bins, dtype=np.int64)
        return lo, lo + self.bin_width - 1


def read_experiment(path) -> tuple[Experiment, dict, dict]:
    """Read an experiment spec: (experiment, fiducial parameters, mock options)."""
    path = Path(path)
    try:
        text = path.read_bytes()
    except FileNotFoundError:
        raise UserError(f"{path}: experiment spec not found") from None
    except OSError as exc:
        raise UserError(f"{path}: experiment spec cannot be read ({exc.strerror or exc})") from None
    try:
        spec = tomllib.loads(text.decode("utf-8"))
    except UnicodeDecodeError:
        raise UserError(f"{path}: experiment spec is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: not valid TOML ({exc})") from None

    for key in spec:
        if key not in _TABLES:
            raise UserError(f"{path}: unknown top-level key {key!r} (known tables: "
                            f"{', '.join('[' + t + ']' for t in _TABLES)})")
    for table in ("experiment", "fiducial"):
        if table not in spec:
            raise UserError(f"{path}: table [{table}] is missing")
    for table in _TABLES:
        if table in spec and not isinstance(spec[table], dict):
            raise UserError(f"{path}: {table} must be a table ([{table}])")

    def where_in(table):
        return lambda key: f"{path}: [{table}] {key}"

    exp_table = spec["experiment"]
    where = where_in("experiment")
    for key in exp_table:
        if key not in _EXPERIMENT_KEYS:
            raise UserError(f"{where(key)}: unknown key (known: {', '.join(_EXPERIMENT_KEYS)})")
    for key in _EXPERIMENT_KEYS:
        if key not in exp_table and key != "pol_noise_factor":
            raise UserError(f"{where(key)}: missing")
    values = dict(exp_table)
    values.setdefault("pol_noise_factor", math.sqrt(2.0))
    _check_experiment(values, where)
    values["spectra"] = tuple(values["spectra"])
    exp = Experiment(**values)

    theory = dict(spec.get("theory", {"code": "camb", "accuracy": "standard"}))
    if "code" not in theory:
        raise UserError(f"{where_in('theory')('code')}: missing (\"camb\" or \"templates\")")
    fid_table = spec["fiducial"]
    where = where_in("fiducial")
    camb_like = theory["code"] == "camb"
    for key, val in fid_table.items():
        if camb_like and key not in FIDUCIAL_REQUIRED + FIDUCIAL_OPTIONAL:
            raise UserError(f"{where(key)}: unknown parameter (known: "
                            f"{', '.join(FIDUCIAL_REQUIRED + FIDUCIAL_OPTIONAL)})")
        if not _is_number(val) or not math.isfinite(val):
            raise UserError(f"{where(key)}: must be a finite number, got {val!r}")
    for key in FIDUCIAL_REQUIRED if camb_like else ():
        if key not in fid_table:
            raise UserError(f"{where(key)}: missing")
    for key in ("omega_b", "omega_c", "H0", "n_eff"):
        if key in fid_table and fid_table[key] <= 0:
            raise UserError(f"{where(key)}: must be > 0, got {fid_table[key]!r}")
    for key in ("tau", "sum_mnu_eV"):
        if key in fid_table and fid_table[key] < 0:
            raise UserError(f"{where(key)}: must be ≥ 0, got {fid_table[key]!r}")
    fiducial = {key: float(val) for key, val in fid_table.items()}

    mock_table = spec.get("mock", {})
    where = where_in("mock")
    options = {"seed": None, "realise": True, "output": None, "description": "", "theory": theory}
    for key, val in mock_table.items():
        if key not in _MOCK_KEYS:
            raise UserError(f"{where(key)}: unknown key (known: {', '.join(_MOCK_KEYS)})")
        if key == "seed" and not (_is_int(val) and val >= 0):
            raise UserError(f"{where(key)}: must be a non-negative integer, got {val!r}")
        if key == "realise" and not isinstance(val, bool):
            raise UserError(f"{where(key)}: must be true or false, got {val!r}")
        if key in ("output", "description") and not isinstance(val, str):
            raise UserError(f"{where(key)}: must be a string, got {val!r}")
        if key == "output" and not val.strip():
            raise UserError(f"{where(key)}: must not be empty")
        options[key] = val
    if options["output"] is not None:
        out = Path(options["output"]).expanduser()
        options["output"] = out if out.is_absolute() else path.resolve().parent / out
    return exp, fiducial, options


def noise_dl(ell, noise_uK_arcmin: float, beam_fwhm_arcmin: float) -> np.ndarray:
    """White noise deconvolved by a Gaussian beam, as D-type ℓ(ℓ+1)N_ℓ/2π in μK² (Knox 1995)."""
    ell = np.asarray(ell, dtype=float)
    if noise_uK_arcmin == 0:
        return np.zeros_like(ell)
    theta = beam_fwhm_arcmin * _ARCMIN
    l2 = ell * (ell + 1.0)
    with np.errstate(over="ignore"):
        n_ell = (noise_uK_arcmin * _ARCMIN) ** 2 * np.exp(l2 * theta**2 / (8.0 * math.log(2.0)))
    return l2 * n_ell / (2.0 * math.pi)


class KnoxBands(NamedTuple):
    """Bands of a mock experiment, grouped by kind in ``exp.spectra`` order, with their covariance."""

    kind: np.ndarray          # (N,) str
    ell_lo: np.ndarray        # (N,) int
    ell_hi: np.ndarray        # (N,) int
    ell_eff: np.ndarray       # (N,) float, band midpoint (the mean ℓ of a top-hat)
    covariance: np.ndarray    # (N, N) μK⁴, D_ℓ-type band powers


def _needed_kinds(spectra_kinds) -> tuple[str, ...]:
    fields = {f for k in spectra_kinds for f in _FIELDS[k]}
    need = [f + f for f in "TEB" if f in fields]
    if "T" in fields and "E" in fields:
        need.append("TE")
    return tuple(need)


def _theory_dl(exp: Experiment, spectra: Spectra, kinds) -> dict[str, np.ndarray]:
    """D_ℓ at ℓ = 0 … exp.ell_max for the kinds asked, checked."""
    if spectra.ell_max < exp.ell_max:
        raise UserError(f"experiment {exp.name!r}: needs theory spectra up to ℓ = {exp.ell_max}, "
                        f"got ℓ ≤ {spectra.ell_max}")
    out = {}
    for kind in kinds:
        if kind not in spectra.dl:
            raise UserError(f"experiment {exp.name!r}: theory spectra lack {kind}, which "
                            f"{'/'.join(exp.spectra)} band powers or their covariance need")
        dl = np.asarray(spectra.dl[kind], dtype=float)
        if dl.ndim != 1 or dl.size < exp.ell_max + 1:
            raise UserError(f"experiment {exp.name!r}: theory {kind} has {dl.size} multipoles, "
                            f"needs {exp.ell_max + 1}")
        dl = dl[: exp.ell_max + 1]
        if not np.all(np.isfinite(dl[exp.ell_min:])):
            raise UserError(f"experiment {exp.name!r}: theory {kind} has NaN or infinite values")
        out[kind] = dl
    return out


def knox_covariance(exp: Experiment, spectra: Spectra) -> KnoxBands:
    """Band edges and the Gaussian band-power covariance (TT–TE–EE cross terms included)."""
    dl = _theory_dl(exp, spectra, _needed_kinds(exp.spectra))
    lo, hi = exp.bin_edges()
    nb, width = exp.n_bins, exp.bin_width
    ell = np.arange(exp.ell_min, exp.ell_min + nb * width)
    nt = noise_dl(ell, exp.noise_uK_arcmin, exp.beam_fwhm_arcmin)
    noise = {"TT": nt, "EE": nt * exp.pol_noise_factor**2, "BB": nt * exp.pol_noise_factor**2}
    zero = np.zeros(ell.size)

    def m(a: str, b: str) -> np.ndarray:
        key = a + b if a + b in ("TT", "TE", "EE", "BB") else b + a
        if key not in ("TT", "TE", "EE", "BB"):
            return zero                           # TB, EB: zero by parity
        if key not in dl:
            return zero                           # never read when not needed
        return dl[key][ell] + noise.get(key, zero)

    modes = (2.0 * ell + 1.0) * exp.fsky
    kinds = exp.spectra
    n = len(kinds) * nb
    cov = np.zeros((n, n))
    for p, kp in enumerate(kinds):
        x, y = _FIELDS[kp]
        for q, kq in enumerate(kinds[p:], start=p):
            w, z = _FIELDS[kq]
            per_ell = (m(x, w) * m(y, z) + m(x, z) * m(y, w)) / modes
            block = per_ell.reshape(nb, width).sum(axis=1) / width**2
            idx_p = p * nb + np.arange(nb)
            idx_q = q * nb + np.arange(nb)
            cov[idx_p, idx_q] = block
            cov[idx_q, idx_p] = block
    kind = np.repeat(np.array(kinds, dtype="<U2"), nb)
    return KnoxBands(kind=kind, ell_lo=np.tile(lo, len(kinds)), ell_hi=np.tile(hi, len(kinds)),
                     ell_eff=np.tile(0.5 * (lo + hi), len(kinds)), covariance=cov)


def simulate(exp: Experiment, spectra: Spectra, seed=None, realise: bool = True) -> dataset.BandPowers:
    """Mock band powers: top-hat-binned theory D_ℓ, plus (``realise``) one Gaussian draw from the Knox
    covariance with ``numpy.random.Generator(PCG64(seed))``. Units D_ℓ μK², top-hat windows."""
    bands = knox_covariance(exp, spectra)
    dl = _theory_dl(exp, spectra, exp.spectra)
    value = np.array([dl[k][a:b + 1].mean() for k, a, b in zip(bands.kind, bands.ell_lo, bands.ell_hi)])
    if realise:
        rng = np.random.default_rng(seed)
        chol = np.linalg.cholesky(bands.covariance)
        value = value + chol @ rng.standard_normal(value.size)
        how = f"Gaussian realisation, seed {seed}"
    else:
        how = "no noise realisation"
    return dataset.from_arrays(kind=bands.kind, ell_lo=bands.ell_lo, ell_hi=bands.ell_hi,
                               ell_eff=bands.ell_eff, value=value, covariance=bands.covariance,
                               units="Dl_uK2", experiment=exp.name,
                               source=f"mock of experiment {exp.name!r} ({how})")


def fisher_matrix(derivs: dict, covariance) -> np.ndarray:
    """F_ij = ∂_i Bᵀ C⁻¹ ∂_j B, rows and columns in the order of ``derivs`` (Tegmark, Taylor &
    Heavens 1997, ApJ 480, 22)."""
    cov = np.asarray(covariance, dtype=float)
    if cov.ndim != 2 or cov.shape[0] != cov.shape[1]:
        raise ValueError(f"covariance must be square, got shape {cov.shape}")
    names = list(derivs)
    if not names:
        raise ValueError("no derivatives given")
    d = np.array([np.asarray(derivs[k], dtype=float) for k in names])
    if d.shape != (len(names), cov.shape[0]):
        raise ValueError(f"derivatives must each have {cov.shape[0]} entries, got shape {d.shape}")
    factor = linalg.cho_factor(cov, lower=True)
    fisher = d @ linalg.cho_solve(factor, d.T)
    return 0.5 * (fisher + fisher.T)


__all__ = ["Experiment", "KnoxBands", "read_experiment", "noise_dl", "knox_covariance", "simulate",
           "fisher_matrix", "FIDUCIAL_REQUIRED", "FIDUCIAL_OPTIONAL"]
