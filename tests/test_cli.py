"""Bad input from the command line and run files: one line naming what is wrong, exit 2, no traceback,
and nothing the user has overwritten."""
from __future__ import annotations

import subprocess
import sys

import pytest

from infer.cli import main

BAD_EDITS = [
    # (what to change in a good run file, words the message must contain)
    (("[theory]", "[theroy]"), "unknown section [theroy]"),
    (("moves = ", "walkers_per = 3\nmoves = "), "sampling.walkers_per"),
    (("walkers = 16", "walkers = 7"), "sampling.walkers"),
    (("prior = { uniform = [0.0, 3.0] }", "prior = { uniform = [3.0, 0.0] }"), "lower < upper"),
    (("prior = { uniform = [0.0, 3.0] }", "prior = { cauchy = [0.0, 3.0] }"), "parameters.a_1.prior"),
    (("guess = 1.0", "guess = 9.0"), "outside the prior support"),
    (('code = "templates"', 'code = "boltzmann9"'), "unknown 'code'"),
    (("[stopping]\n", "[stopping]\ntime_limit = \"soon\"\n"), "stopping.time_limit"),
    (("seed = 11", "seed = -4"), "run.seed"),
    (("[parameters.a_1]", "[parameters.a_9]\nvalue = 1.0\n[parameters.a_1]"), "a_9"),
    (("[parameters.a_4]\n", "[parameters.a_4]\nvalue = 2.0\n"), "both 'value'"),
    (("ensembles = 2", "ensembles = 2\nensembles = 3"), "not valid TOML"),
]


@pytest.mark.parametrize("edit,words", BAD_EDITS)
def test_bad_run_file_is_one_line(write_config, capsys, edit, words):
    cfg, chain = write_config()
    text = cfg.read_text()
    assert edit[0] in text
    cfg.write_text(text.replace(edit[0], edit[1], 1))
    assert main(["run", str(cfg)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("infer: error: ") and words in err[0], err[0]
    assert not chain.exists()


def test_missing_dataset_and_missing_run_file(write_config, capsys, tmp_path):
    cfg, _ = write_config()
    cfg.write_text(cfg.read_text().replace("quick_bandpowers.h5", "nowhere.h5"))
    assert main(["run", str(cfg)]) == 2
    assert "nowhere.h5" in capsys.readouterr().err
    assert main(["run", str(tmp_path / "absent.toml")]) == 2
    assert "absent.toml: no such run file" in capsys.readouterr().err


def test_existing_chain_is_never_overwritten(write_config, capsys):
    cfg, chain = write_config(steps=10, check_every=10)
    assert main(["--quiet", "run", str(cfg)]) == 0
    before = chain.read_bytes()
    assert main(["run", str(cfg)]) == 2
    assert "already exists" in capsys.readouterr().err
    assert chain.read_bytes() == before
    # --replace sets the old chain aside under a new name; its bytes survive.
    assert main(["--quiet", "run", str(cfg), "--replace"]) == 0
    aside = [p for p in chain.parent.iterdir() if ".replaced-" in p.name]
    assert len(aside) == 1 and aside[0].read_bytes() == before


def test_resume_refuses_posterior_change_with_readable_diff(write_config, capsys, tmp_path):
    cfg, chain = write_config(steps=10, check_every=10)
    assert main(["--quiet", "run", str(cfg)]) == 0
    changed = tmp_path / "changed.toml"
    changed.write_text(cfg.read_text().replace("prior = { uniform = [0.0, 3.0] }",
                                               "prior = { uniform = [0.0, 2.5] }", 1)
                       .replace("steps = 400", "steps = 20"))
    before = chain.read_bytes()
    assert main(["resume", str(chain), "--config", str(changed)]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1
    assert "parameters.a_1.prior.uniform: [0.0, 3.0] → [0.0, 2.5]" in err
    assert chain.read_bytes() == before
    # Run-control changes are allowed and recorded.
    allowed = tmp_path / "allowed.toml"
    allowed.write_text(cfg.read_text().replace("steps = 10", "steps = 20").replace("check_every = 10",
                                                                                  "check_every = 5"))
    assert main(["--quiet", "resume", str(chain), "--config", str(allowed)]) == 0
    from infer.store.chainfile import ChainStore
    state = ChainStore(str(chain)).read()
    assert state.steps_done == 20
    resume = [e for e in state.events if e["event"] == "resume"][-1]
    assert any("sampling.steps" in c for c in resume["changes"])


def test_bad_command_line_values(write_config, capsys, tmp_path):
    cfg, chain = write_config()
    assert main(["run", str(cfg), "--time-limit", "tomorrow"]) == 2
    assert "--time-limit" in capsys.readouterr().err
    assert main(["status", str(tmp_path / "none.h5")]) == 2
    assert "no such chain file" in capsys.readouterr().err
    not_chain = tmp_path / "x.h5"
    not_chain.write_bytes(b"this is not HDF5")
    assert main(["status", str(not_chain)]) == 2
    assert "damaged or not an HDF5 file" in capsys.readouterr().err


def test_no_traceback_from_the_installed_command(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[run]\nname = 'x'\n")
    out = subprocess.run([sys.executable, "-m", "infer", "run", str(bad)], capture_output=True, text=True)
    assert out.returncode == 2
    assert "Traceback" not in out.stderr and len(out.stderr.strip().splitlines()) == 1
