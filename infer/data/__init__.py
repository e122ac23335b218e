"""Band-power datasets: read, check, convert once to D_ℓ in μK², write.

One concept per module: `bandpowers` (the `BandPowers` type, its units and cuts), `checks` (every
check of a dataset's arrays and the one unit conversion), `hdf5` (our file format, reader and writer),
`text` (plain table plus covariance file), `saccfile` / `saccwrite` (SACC files, the open format: reader / writer). This package's
functions are the way in:

* `load(path, covariance=None, units=None, theory_ell_max=None)` dispatches on the suffix:
  ``.h5``/``.hdf5`` our HDF5 format, ``.txt``/``.dat``/``.csv`` a plain table (then ``covariance``
  and ``units`` are required), ``.fits``/``.fit``/``.sacc`` — or any other suffix when the file starts
  with the FITS signature — a SACC file (`saccfile`; ``units`` required unless the file records them);
* `write(bp, path, overwrite=False, description="")` writes atomically: SACC for ``.fits``/``.fit``/
  ``.sacc``, else our HDF5 format (`check_target(path, overwrite)` checks the target the same way);
* `from_arrays(...)` builds a checked dataset in memory (the mock generator's route).

Every check runs before any theory call and fails with a one-line `infer.errors.UserError` that names
the file and the field.
"""
from __future__ import annotations

from pathlib import Path

from infer.data import hdf5, saccfile, saccwrite, text
from infer.data.bandpowers import MAX_ELL, UNITS, BandPowers
from infer.data.checks import from_arrays
from infer.data.hdf5 import FORMAT, FORMAT_VERSION
from infer.errors import UserError

HDF5_SUFFIXES = hdf5.SUFFIXES
PLAIN_SUFFIXES = text.SUFFIXES
SACC_SUFFIXES = saccfile.SUFFIXES


def load(path, covariance=None, units=None, theory_ell_max=None) -> BandPowers:
    """Read a dataset, dispatching on the suffix (see the package docstring).

    With ``theory_ell_max`` every band's window support is checked against the theory's reach.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix in HDF5_SUFFIXES:
        if covariance is not None:
            raise UserError(f"{path}: a separate covariance file is only read for plain-text "
                            f"datasets; the HDF5 file holds its own 'covariance'")
        return hdf5.read(path, units, theory_ell_max)
    if suffix in PLAIN_SUFFIXES:
        return text.read(path, covariance, units, theory_ell_max)
    if saccfile.is_sacc(path):
        if covariance is not None:
            raise UserError(f"{path}: a separate covariance file is only read for plain-text "
                            f"datasets; the SACC file holds its own covariance")
        return saccfile.read(path, units, theory_ell_max)
    raise UserError(f"{path}: unknown dataset suffix {path.suffix!r} (use .h5/.hdf5 for the "
                    f"infer band-power format, .fits/.sacc for a SACC file or .txt/.dat/.csv for a plain table)")


def _writer(path):
    return saccwrite if Path(path).suffix.lower() in SACC_SUFFIXES else hdf5


def check_target(path, overwrite: bool = False) -> Path:
    """Where `write` would write, checked without writing (SACC for .fits/.fit/.sacc, else HDF5)."""
    return _writer(path).check_target(path, overwrite)


def write(bp: BandPowers, path, overwrite: bool = False, description: str = "") -> Path:
    """Write ``bp`` atomically: a SACC file for .fits/.fit/.sacc, else our HDF5 format."""
    return _writer(path).write(bp, path, overwrite=overwrite, description=description)


__all__ = ["load", "write", "from_arrays", "check_target", "BandPowers", "UNITS", "MAX_ELL",
           "FORMAT", "FORMAT_VERSION", "HDF5_SUFFIXES", "PLAIN_SUFFIXES", "SACC_SUFFIXES"]
