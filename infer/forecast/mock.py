"""Mock band powers of an invented experiment: binned fiducial spectra plus one Gaussian draw.

The band powers are the top-hat means of the fiducial D_ℓ over each bin of the `Experiment`; with
``realise`` one draw from the multivariate Gaussian with the Knox covariance (`infer.forecast.knox`)
is added — the Gaussian likelihood approximation of band powers; the exact full-sky distribution of
Ĉ_ℓ is Wishart (e.g. Percival & Brown 2006, MNRAS 372, 1104). The draw uses
``numpy.random.Generator(PCG64(seed))`` and the Cholesky factor of the covariance, so a seed gives the
same dataset on every platform numpy supports.
"""
from __future__ import annotations

import numpy as np

from infer import data
from infer.forecast.experiment import Experiment
from infer.errors import UserError
from infer.forecast.knox import knox_covariance, theory_dl
from infer.theory.base import Spectra


def simulate(exp: Experiment, spectra: Spectra, seed=None, realise: bool = True) -> data.BandPowers:
    """Mock band powers: top-hat-binned theory D_ℓ, plus (``realise``) one Gaussian draw from the Knox
    covariance. Units D_ℓ μK², top-hat windows; checked like any dataset (`infer.data.from_arrays`)."""
    bands = knox_covariance(exp, spectra)
    dl = theory_dl(exp, spectra, exp.spectra)
    value = np.array([dl[k][a:b + 1].mean() for k, a, b in zip(bands.kind, bands.ell_lo, bands.ell_hi)])
    if realise:
        rng = np.random.default_rng(seed)
        try:
            chol = np.linalg.cholesky(bands.covariance)
        except np.linalg.LinAlgError:
            raise UserError(f"experiment {exp.name!r}: the Knox covariance is not positive definite "
                            "(zero signal and zero noise in some band?); no realisation can be "
                            "drawn") from None
        value = value + chol @ rng.standard_normal(value.size)
        how = f"Gaussian realisation, seed {seed}"
    else:
        how = "no noise realisation"
    return data.from_arrays(kind=bands.kind, ell_lo=bands.ell_lo, ell_hi=bands.ell_hi,
                            ell_eff=bands.ell_eff, value=value, covariance=bands.covariance,
                            units="Dl_uK2", experiment=exp.name,
                            source=f"mock of experiment {exp.name!r} ({how})")


__all__ = ["simulate", "Experiment"]
