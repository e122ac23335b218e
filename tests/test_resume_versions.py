"""A chain written by a version whose theory returned other derived quantities is refused on resume in one
line (never an internal error): measured on a chain of the previous version, whose CAMB backend returned
seven derived quantities where this one returns thirteen."""
from __future__ import annotations

from types import SimpleNamespace

import pytest

from infer.errors import UserError
from infer.run import check_blobs


def test_other_derived_quantities_are_refused_in_one_line():
    now = SimpleNamespace(derived_names=("H0", "sigma_8", "r_drag", "chi2"))
    with pytest.raises(UserError) as err:
        check_blobs(("H0", "sigma_8", "chi2"), now, "old.h5")
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith("refusing to resume old.h5") and "new: r_drag" in msg
    check_blobs(("H0", "sigma_8", "r_drag", "chi2"), now, "same.h5")       # equal sets resume
