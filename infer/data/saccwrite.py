"""Writing our band powers as a SACC file (the open summary-statistics format; `sacc` on PyPI): one
spin-0 and one spin-2 map tracer per channel, one band-power window, the full covariance, and metadata
recording our units and experiment, so `infer.data.saccfile.read` reads them back unchanged. Beam modes
have no SACC home and are refused. Split from `infer.data.saccfile` (the reader)."""
from __future__ import annotations

from pathlib import Path
import numpy as np
from infer.data.bandpowers import UNITS, BandPowers
from infer.data.checks import dl_factor, read_bytes
from infer.data.hdf5 import FORMAT
from infer.errors import UserError

from infer.data.saccfile import MAP_UNITS, SPINS, SUFFIXES, _parse  # noqa: F401


def check_target(path, overwrite: bool = False) -> Path:
    """Where `write` would write, checked without writing (suffix, folder, existing file): the HDF5
    writer's rule with the SACC suffixes."""
    from infer.data import hdf5
    return hdf5.check_target(path, overwrite, SUFFIXES,
                             "a SACC dataset is written as FITS; use the suffix .fits or .sacc")


def replaceable(path) -> None:
    """Refuse (one line) to let ``--replace`` overwrite a file that is not a SACC dataset written by infer."""
    path = Path(path)
    try:
        s = _parse(path, read_bytes(path, "existing file"))
    except UserError as err:
        raise UserError(f"{err}; --replace only overwrites an infer dataset file") from None
    if s.metadata.get("format") != FORMAT:
        raise UserError(f"{path} is a SACC file not written by infer; --replace only overwrites an infer dataset "
                        f"file: choose another path, or move the file yourself")


def write(bp: BandPowers, path, overwrite: bool = False, description: str = "") -> Path:
    """Write ``bp`` as a SACC file in its declared units (`read` gives it back); atomic, never clobbers
    without ``overwrite``. Beam modes have no SACC field and are refused."""
    import sacc
    from infer.atomic import write_atomic
    target = check_target(path, overwrite)
    if bp.beam_modes.shape[0]:
        raise UserError(f"{target}: the dataset has beam modes, which SACC cannot hold; write our HDF5 format")
    cl_type, scale = UNITS[bp.units]
    window = np.asarray(bp.window, float)
    if cl_type:
        factor = dl_factor(np.asarray(bp.window_ell))
        window = window * np.divide(1.0, factor, out=np.zeros_like(factor), where=factor > 0)[None, :]
    s = sacc.Sacc()
    s.metadata["format"] = FORMAT                     # marks a file this writer made (see `replaceable`)
    s.metadata["units"] = bp.units
    if bp.experiment:
        s.metadata["experiment"] = str(bp.experiment)
    if description:
        s.metadata["description"] = str(description)
    single = all(c.name == "" for c in bp.channels)
    map_unit = {v: k for k, v in MAP_UNITS.items()}[bp.units.split("_")[1]]
    names = {}
    for c in bp.channels:
        base = c.name or "cmb"
        for spin in (0, 2):
            tname = f"{base}_s{spin}"
            names[(c.name, spin)] = tname
            meta = {} if single else {"channel": c.name, "nu_ghz": float(c.nu_ghz)}
            beam = {"ell": np.asarray(bp.window_ell), "beam": np.ones(bp.window_ell.size), "map_unit": map_unit}
            if single:
                s.add_tracer("Map", tname, spin=spin, metadata=meta, **beam)
                continue
            nu, w = ((c.bandpass_nu_ghz, c.bandpass_weight) if c.bandpass_nu_ghz is not None
                     else ([c.nu_ghz], [1.0]))
            s.add_tracer("NuMap", tname, spin=spin, nu=np.asarray(nu, float), bandpass=np.asarray(w, float),
                         metadata=meta, **beam)
    win = sacc.BandpowerWindow(np.asarray(bp.window_ell), window.T.copy())
    dtype = {"TT": "cl_00", "TE": "cl_0e", "EE": "cl_ee", "BB": "cl_bb"}
    for b in range(len(bp)):
        k = str(bp.kind[b])
        tags = {"ell": float(bp.ell_eff[b]), "window": win, "window_ind": b,
                "ell_lo": int(bp.ell_lo[b]), "ell_hi": int(bp.ell_hi[b])}
        for tag in ("noise", "fiducial"):
            v = np.asarray(getattr(bp, tag), float)
            if np.isfinite(v).any():
                tags[tag] = float(v[b]) / scale
        s.add_data_point(dtype[k], (names[(str(bp.channel_1[b]), SPINS[k][0])],
                                    names[(str(bp.channel_2[b]), SPINS[k][1])]), float(bp.value[b]) / scale, **tags)
    s.add_covariance(np.asarray(bp.covariance, float) / scale**2)
    return write_atomic(target, lambda tmp: s.save_fits(tmp, overwrite=True), overwrite=overwrite)


__all__ = ["write", "check_target", "replaceable"]
