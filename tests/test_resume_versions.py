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


def test_a_chain_with_the_biased_snooker_move_is_refused(write_config, capsys):
    # A chain whose DE-snooker steps came from infer < 0.3 (emcee's DESnookerMove, see
    # infer/sampling/moves.py) is refused on resume in one line; the same chain with the fixed move resumes.
    import h5py
    from infer.cli import main
    cfg, chain = write_config(steps=20, checkpoint_steps=10, check_every=10)
    assert main(["--quiet", "run", str(cfg)]) == 0
    with h5py.File(chain, "r+") as f:
        f.attrs["infer_version"] = b"0.2.0"
    capsys.readouterr()
    assert main(["--quiet", "resume", str(chain), "--steps", "30"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "DE-snooker" in err and "0.2.0" in err
    with h5py.File(chain, "r+") as f:
        f.attrs["infer_version"] = b"0.3.0"
    assert main(["--quiet", "resume", str(chain), "--steps", "30"]) == 0


def test_a_surrogate_engine_chain_before_the_driver_chain_is_refused(tmp_path):
    # From 0.4 the surrogate chain is the plain driver's (infer/sampling/surrogate_chain.py): the exact calls
    # of an older engine run cannot be replayed, so its resume is one line, not a divergence mid-run.
    import h5py
    from infer.run import check_moves_version
    chain = tmp_path / "old-engine.h5"
    cfg = SimpleNamespace(sampling=SimpleNamespace(engine="surrogate", moves="de-snooker"))
    plain = SimpleNamespace(sampling=SimpleNamespace(engine="ensemble", moves="de-snooker"))
    with h5py.File(chain, "w") as f:
        f.attrs["infer_version"] = b"0.3.0"
    with pytest.raises(UserError) as err:
        check_moves_version(chain, cfg)
    assert "\n" not in str(err.value) and "0.3.0" in str(err.value) and "replay" in str(err.value)
    check_moves_version(chain, plain)                       # an ensemble chain of 0.3 resumes
    with h5py.File(chain, "r+") as f:
        f.attrs["infer_version"] = b"0.4.0"
    check_moves_version(chain, cfg)
