"""The posterior's bookkeeping: names, blobs and the demo run file."""
from __future__ import annotations

from pathlib import Path

from infer import config
from infer.model.posterior import Posterior

DEMO = Path(__file__).resolve().parent.parent / "configs" / "kestrel_demo.toml"


def test_demo_run_file_is_valid_and_names_are_unique():
    # Builds CAMB's parameter structure but makes no Boltzmann call.
    cfg = config.load(DEMO)
    post = Posterior(cfg)
    names = post.names + post.derived_names
    assert len(set(names)) == len(names)
    # θ_* is sampled, so H0 is derived and θ_* is not repeated among the derived values.
    assert "theta_star_100" in post.names and "theta_star_100" not in post.derived_names
    assert "H0" in post.derived_names and "chi2" in post.derived_names
    assert post.blob_names == ("log_like",) + post.derived_names
    assert post.like.n == 147 and post.data.experiment == "Kestrel"
