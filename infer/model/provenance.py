"""The provenance record of a chain: what was run, on what data, with which code, where.

Stored in the chain file at creation (common practice for reproducible analyses: the full run file, the
dataset's SHA-256, the model description and every library version), so that a chain can be traced and
rerun years later and a resume can refuse a changed dataset.
"""
from __future__ import annotations

import json
import platform
import socket

from infer import __version__


def versions(theory=None) -> dict[str, str]:
    """Versions of Python, infer, its numerical libraries and the theory backend (if given)."""
    import emcee
    import h5py
    import numpy
    import scipy
    out = {"infer": __version__, "python": platform.python_version(), "numpy": numpy.__version__,
           "scipy": scipy.__version__, "emcee": emcee.__version__, "h5py": h5py.__version__,
           "hdf5": h5py.version.hdf5_version}
    if theory is not None:
        out.update(theory.versions())
    return out


def record(cfg, posterior) -> dict[str, str]:
    """The provenance record of a new chain of run ``cfg`` with its built ``posterior``."""
    return {
        "config_text": cfg.text, "config_path": cfg.path, "run_name": cfg.name, "seed": cfg.seed,
        "dataset_file": cfg.dataset["file"], "dataset_sha256": posterior.data.sha256,
        "experiment": posterior.data.experiment, "model": json.dumps(posterior.describe(), default=str),
        "versions": json.dumps(versions(posterior.theory)), "host": socket.gethostname(),
    }
