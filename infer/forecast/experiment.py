"""Invented CMB experiments: the `Experiment` spec and the reader of its TOML file.

An experiment is summarised by its sky fraction f_sky, a white-noise level σ_T (μK·arcmin) in
temperature, a Gaussian beam of full width at half maximum θ_FWHM, a polarisation-noise factor
σ_P/σ_T (default √2: one set of detectors measuring both Stokes parameters — common practice) and a
range of multipoles cut into equal top-hat bins: [ell_min + k·w, ell_min + (k+1)·w − 1] for every k
whose bin ends at or below ell_max (a last partial bin is dropped). The noise and covariance model these
numbers feed is `infer.forecast.knox` (Knox 1995, Phys. Rev. D 52, 4307).

The spec file is a TOML file of our own layout (read with `tomllib`, checked with `infer.validate`;
every message names the file and the dotted key)::

    [experiment]        name, fsky, noise_uK_arcmin, beam_fwhm_arcmin, ell_min, ell_max, bin_width,
                        spectra, pol_noise_factor (optional)
    [fiducial]          omega_b, omega_c, H0, ln_As_1e10, n_s, tau (required), sum_mnu_eV, n_eff
    [mock]              seed, realise, output (.h5, relative to the spec file), description (optional)
    [theory]            optional: the backend that makes the fiducial spectra, as in a run file
                        (default code = "camb", accuracy = "standard"); with code = "templates" the
                        [fiducial] table holds that model's amplitudes instead of ΛCDM parameters

Ranges: ℓ up to `MAX_ELL`, at most `MAX_BANDS` bands in all (the covariance is dense), and the
beam-deconvolved noise must stay finite up to ell_max (a beam too wide for the ℓ range overflows it).
"""
from __future__ import annotations

import math

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from infer import validate
from infer.data.bandpowers import MAX_ELL
from infer.data.checks import read_bytes
from infer.errors import UserError
from infer.theory.base import KINDS

#: Fiducial parameters every ΛCDM spec names, and the ones it may name.
FIDUCIAL_REQUIRED = ("omega_b", "omega_c", "H0", "ln_As_1e10", "n_s", "tau")
FIDUCIAL_OPTIONAL = ("sum_mnu_eV", "n_eff")
#: Largest number of bands of a mock (spectra × bins): its dense covariance is then 0.8 GB.
MAX_BANDS = 10_000
#: Smallest sky fraction (0.04 deg²): the f_sky-scaled mode count of the Knox formula means nothing for
#: patches smaller than a few times the bins' angular scale, and smaller values overflow the covariance.
MIN_FSKY = 1e-6

EXPERIMENT_KEYS = ("name", "fsky", "noise_uK_arcmin", "beam_fwhm_arcmin", "ell_min", "ell_max",
                   "bin_width", "spectra", "pol_noise_factor")
MOCK_KEYS = ("seed", "realise", "output", "description")
TABLES = ("experiment", "fiducial", "mock", "theory")
_MAX_SEED = 2**63 - 1


def check_experiment(v: dict, where: str, prefix: str = "") -> None:
    """Check experiment values; messages read ``WHERE: 'PREFIXkey' must be …``."""
    def key(k):
        return prefix + k

    validate.text(where, key("name"), v["name"], line=True)
    validate.number(where, key("fsky"), v["fsky"], low=MIN_FSKY, high=1.0)
    validate.number(where, key("noise_uK_arcmin"), v["noise_uK_arcmin"], low=0.0)
    validate.number(where, key("beam_fwhm_arcmin"), v["beam_fwhm_arcmin"], low=0.0)
    validate.number(where, key("pol_noise_factor"), v["pol_noise_factor"], low=0.0, low_open=True)
    validate.number(where, key("ell_min"), v["ell_min"], integer=True, low=2, high=MAX_ELL)
    validate.number(where, key("ell_max"), v["ell_max"], integer=True, low=2, high=MAX_ELL)
    validate.number(where, key("bin_width"), v["bin_width"], integer=True, low=1, high=MAX_ELL)
    if v["ell_max"] - v["ell_min"] + 1 < v["bin_width"]:
        raise UserError(f"{where}: '{key('ell_max')}': ℓ {v['ell_min']}–{v['ell_max']} holds no full bin "
                        f"of width {v['bin_width']}")
    spectra = validate.subset(where, key("spectra"), v["spectra"], KINDS)
    bands = len(spectra) * ((v["ell_max"] - v["ell_min"] + 1) // v["bin_width"])
    if bands > MAX_BANDS:
        raise UserError(f"{where}: '{key('bin_width')}' = {v['bin_width']} makes {bands} bands over "
                        f"ℓ {v['ell_min']}–{v['ell_max']} and {len(spectra)} spectra; at most {MAX_BANDS}")
    # The covariance holds squares of the noise spectrum: both must be finite up to ell_max.
    from infer.forecast.knox import noise_dl
    with np.errstate(over="ignore", invalid="ignore"):
        beam_only = noise_dl(v["ell_max"], 1.0, v["beam_fwhm_arcmin"])
        worst = noise_dl(v["ell_max"], v["noise_uK_arcmin"], v["beam_fwhm_arcmin"]) * \
            max(1.0, np.float64(v["pol_noise_factor"])) ** 2
        worst = worst * worst
    if not np.isfinite(beam_only * beam_only):
        raise UserError(f"{where}: '{key('beam_fwhm_arcmin')}' = {v['beam_fwhm_arcmin']}: the "
                        f"beam-deconvolved noise overflows before ℓ = {v['ell_max']} (beam too wide "
                        f"for this ℓ range)")
    if not np.isfinite(worst):
        culprit = "pol_noise_factor" if v["pol_noise_factor"] > 1e10 else "noise_uK_arcmin"
        raise UserError(f"{where}: '{key(culprit)}' = {v[culprit]}: the noise covariance overflows a "
                        f"double at ℓ = {v['ell_max']}")


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
        check_experiment(self.__dict__, f"experiment {self.name!r}")

    @property
    def n_bins(self) -> int:
        """Bins per spectrum."""
        return (self.ell_max - self.ell_min + 1) // self.bin_width

    def bin_edges(self) -> tuple[np.ndarray, np.ndarray]:
        """(ell_lo, ell_hi) of the bins of one spectrum, inclusive."""
        lo = self.ell_min + self.bin_width * np.arange(self.n_bins, dtype=np.int64)
        return lo, lo + self.bin_width - 1


def _fiducial(where: str, table: dict, camb_like: bool) -> dict[str, float]:
    for key, val in table.items():
        if camb_like and key not in FIDUCIAL_REQUIRED + FIDUCIAL_OPTIONAL:
            raise UserError(f"{where}: unknown key 'fiducial.{key}' (known: "
                            f"{', '.join(FIDUCIAL_REQUIRED + FIDUCIAL_OPTIONAL)})")
        validate.number(where, f"fiducial.{key}", val)
    for key in FIDUCIAL_REQUIRED if camb_like else ():
        if key not in table:
            raise UserError(f"{where}: missing key 'fiducial.{key}'")
    for key in ("omega_b", "omega_c", "H0", "n_eff"):
        if key in table:
            validate.number(where, f"fiducial.{key}", table[key], low=0.0, low_open=True)
    for key in ("tau", "sum_mnu_eV"):
        if key in table:
            validate.number(where, f"fiducial.{key}", table[key], low=0.0)
    return {key: float(val) for key, val in table.items()}


def _mock_options(path: Path, table: dict) -> dict:
    where = str(path)
    validate.check_keys(where, "mock", table, MOCK_KEYS)
    options = {"seed": None, "realise": True, "output": None, "description": ""}
    if "seed" in table:
        options["seed"] = validate.number(where, "mock.seed", table["seed"], integer=True, low=0,
                                          high=_MAX_SEED)
    if "realise" in table:
        options["realise"] = validate.boolean(where, "mock.realise", table["realise"])
    if "description" in table:
        options["description"] = validate.text(where, "mock.description", table["description"],
                                               empty=True)
    if "output" in table:
        out = Path(validate.text(where, "mock.output", table["output"])).expanduser()
        if out.suffix.lower() not in (".h5", ".hdf5"):
            raise UserError(f"{where}: 'mock.output' must end in .h5 or .hdf5 (a dataset is written as "
                            f"HDF5), got {table['output']!r}")
        options["output"] = out if out.is_absolute() else path.resolve().parent / out
    return options


def read_experiment(path) -> tuple[Experiment, dict, dict]:
    """Read an experiment spec: (experiment, fiducial parameters, mock options incl. 'theory')."""
    path = Path(path)
    data = read_bytes(path, "experiment spec")
    try:
        spec = tomllib.loads(data.decode("utf-8"))
    except UnicodeDecodeError:
        raise UserError(f"{path}: experiment spec is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise UserError(f"{path}: not valid TOML ({' '.join(str(exc).split())})") from None
    where = str(path)
    for key in spec:
        if key not in TABLES:
            raise UserError(f"{path}: unknown top-level key {key!r} (known tables: "
                            f"{', '.join('[' + t + ']' for t in TABLES)})")
    for table in ("experiment", "fiducial"):
        if table not in spec:
            raise UserError(f"{path}: table [{table}] is missing")
    for table in TABLES:
        if table in spec and not isinstance(spec[table], dict):
            raise UserError(f"{path}: [{table}] must be a table, got {validate.show(spec[table])}")

    exp_table = spec["experiment"]
    validate.check_keys(where, "experiment", exp_table, EXPERIMENT_KEYS)
    for key in EXPERIMENT_KEYS:
        if key not in exp_table and key != "pol_noise_factor":
            raise UserError(f"{path}: missing key 'experiment.{key}'")
    values = dict(exp_table)
    values.setdefault("pol_noise_factor", math.sqrt(2.0))
    check_experiment(values, where, prefix="experiment.")
    values["spectra"] = tuple(values["spectra"])
    exp = Experiment(**values)

    theory = dict(spec.get("theory", {"code": "camb", "accuracy": "standard"}))
    if "code" not in theory:
        raise UserError(f"{path}: missing key 'theory.code' (\"camb\" or \"templates\")")
    validate.text(where, "theory.code", theory["code"])
    fiducial = _fiducial(where, spec["fiducial"], theory["code"] == "camb")
    options = _mock_options(path, spec.get("mock", {}))
    options["theory"] = theory
    return exp, fiducial, options


__all__ = ["Experiment", "read_experiment", "check_experiment", "FIDUCIAL_REQUIRED",
           "FIDUCIAL_OPTIONAL", "MAX_BANDS"]
