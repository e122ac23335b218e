"""Bad input on the command line, in the theory settings and at the output paths, class by class.

The promise (README, "bad input"): one line on stderr naming the option, file or key and what is wrong,
exit status 2, no traceback, no theory call, and nothing the user has overwritten or lost. Theory calls
are counted by wrapping the template model's `compute`; every command runs in this process
(``workers = 0``) so the count sees them. Conventions checked against the outside: argparse's own
one-line error text (Python standard library), and the shell's 128 + SIGPIPE status for a program whose
reader has gone (POSIX `signal.SIGPIPE`, via the standard library's `signal` module).
"""
from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from infer.cli import EXIT_PIPE, main
from infer.theory.templates import TemplateTheory

REPO = Path(__file__).resolve().parents[1]
SPEC = REPO / "configs" / "quick_experiment.toml"


@pytest.fixture
def calls(monkeypatch):
    """Counts theory calls of the template model made in this process."""
    count = {"n": 0}
    original = TemplateTheory.compute

    def counting(self, params):
        count["n"] += 1
        return original(self, params)
    monkeypatch.setattr(TemplateTheory, "compute", counting)
    return count


def one_line(capsys, *words) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    line = err[0]
    assert line.startswith("infer: error: "), line
    assert "Traceback" not in line and "usage:" not in line, line
    for w in words:
        assert w in line, (w, line)
    return line


def folder_state(folder: Path) -> dict:
    return {p: p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


# -- 1. command-line parsing: one line with a pointer to --help, never a usage block --------------------
ARGV_ERRORS = [
    (["run"], ["config", "(see infer run --help)"]),
    (["run", "{cfg}", "--steps", "0"], ["--steps", ">= 1"]),
    (["run", "{cfg}", "--steps", "many"], ["--steps", "integer"]),
    (["run", "{cfg}", "--workers", "-1"], ["--workers", ">= 0"]),
    (["run", "{cfg}", "--time-limit", ""], ["--time-limit"]),
    (["run", "{cfg}", "--time-limit", "soon"], ["--time-limit"]),
    (["run", "{cfg}", "--time-limit", "1:75:00"], ["--time-limit", "minutes"]),
    (["run", "{cfg}", "--bogus"], ["--bogus", "(see infer --help)"]),
    (["check", "{cfg}", "--calls", "0"], ["--calls", ">= 1", "(see infer check --help)"]),
    (["check", "{cfg}", "--calls", "-3"], ["--calls", ">= 1"]),
    (["check", "{cfg}", "--calls", "2.5"], ["--calls", "integer"]),
    (["resume", "{chain}", "--steps", "-5"], ["--steps"]),
    (["summarize", "{chain}", "--burn", "-1"], ["--burn"]),
    (["simulate", str(SPEC), "--seed", "-1"], ["--seed"]),
    (["frobnicate"], ["frobnicate", "(see infer --help)"]),
    ([], ["COMMAND"]),
]


@pytest.mark.parametrize("argv,words", ARGV_ERRORS)
def test_argument_errors_are_one_line_and_exit_2(write_config, capsys, calls, argv, words):
    cfg, chain = write_config()
    argv = [a.format(cfg=cfg, chain=chain) for a in argv]
    assert main(argv) == 2
    one_line(capsys, *words)
    assert calls["n"] == 0 and not chain.exists()


def test_help_still_works_and_exits_0(capsys):
    with pytest.raises(SystemExit) as info:
        main(["check", "--help"])
    assert info.value.code == 0
    assert "--calls" in capsys.readouterr().out


def test_installed_command_prints_one_line_for_a_parsing_error(tmp_path):
    r = subprocess.run([sys.executable, "-m", "infer", "check", "x.toml", "--calls", "0"],
                       capture_output=True, text=True, cwd=tmp_path)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("infer: error: ") and "--calls" in lines[0], r.stderr
    assert r.stdout == ""


# -- 2. theory settings: type and range of every key, before any theory call ----------------------------
THEORY_ERRORS = [
    ("delay_seconds = inf", "delay_seconds"),
    ("delay_seconds = -1.0", "delay_seconds"),
    ('delay_seconds = "slow"', "delay_seconds"),
    ("delay_seconds = true", "delay_seconds"),
    ("delay_seconds = 1e9", "delay_seconds"),
    ('fault = { parameter = "a_1", above = true, action = "exit" }', "fault"),
    ('fault = { parameter = "a_9", above = 1.0, action = "exit" }', "fault"),
    ('fault = { parameter = "a_1", above = 1.0, action = "exit", extra = 1 }', "fault"),
    ("speed = 3", "speed"),
]
CAMB_ERRORS = [
    ("accuracy = 3", "accuracy"),
    ('accuracy = "ultra"', "accuracy"),
    ('ell_margin = "x"', "ell_margin"),
    ("ell_margin = 250.5", "ell_margin"),
    ('sum_mnu_eV = "0.06"', "sum_mnu_eV"),
    ("sum_mnu_eV = nan", "sum_mnu_eV"),
    ("n_eff = -1.0", "n_eff"),
]


@pytest.mark.parametrize("line,key", THEORY_ERRORS)
def test_bad_template_setting_is_one_line(write_config, capsys, calls, line, key):
    cfg, chain = write_config(theory_extra=line)
    for argv in (["run", str(cfg)], ["check", str(cfg)]):
        assert main(argv) == 2
        one_line(capsys, str(cfg), "[theory]", f"'{key}'")
    assert calls["n"] == 0 and not chain.exists()


@pytest.mark.parametrize("line,key", CAMB_ERRORS)
def test_bad_camb_setting_is_one_line_without_loading_camb(write_config, capsys, line, key):
    cfg, chain = write_config()
    cfg.write_text(cfg.read_text().replace('code = "templates"', f'code = "camb"\n{line}'))
    assert main(["run", str(cfg)]) == 2
    one_line(capsys, str(cfg), "[theory]", f"'{key}'")
    assert not chain.exists()


def test_theory_settings_are_checked_without_the_backend():
    """`infer.theory.check_settings` (for the run-file reader) imports no Boltzmann code."""
    code = ("import sys\nfrom infer.theory import check_settings\nfrom infer.errors import UserError\n"
            "try:\n    check_settings({'code': 'camb', 'accuracy': 3}, 'r.toml: [theory]')\n"
            "except UserError as e:\n    assert \"'accuracy'\" in str(e)\nelse:\n    raise SystemExit(1)\n"
            "assert 'camb' not in sys.modules")
    subprocess.run([sys.executable, "-c", code], check=True)


# -- 3. --replace sets aside an infer chain, and nothing else -------------------------------------------
def test_replace_refuses_a_dataset_or_any_other_file_at_the_chain_path(write_config, quick_data, capsys, calls):
    cfg, chain = write_config(steps=10, check_every=10)
    chain.parent.mkdir(parents=True, exist_ok=True)
    for content in ("dataset", "text", "folder"):
        if chain.is_file():
            chain.unlink()
        if content == "dataset":
            shutil.copy(quick_data, chain)             # an HDF5 file, but a dataset
        elif content == "text":
            chain.write_text("my notes\n")
        else:
            chain.mkdir()
        before = folder_state(chain.parent)
        assert main(["run", str(cfg), "--replace"]) == 2
        one_line(capsys, str(chain), "--replace")
        assert folder_state(chain.parent) == before
        assert not [p for p in chain.parent.iterdir() if ".replaced-" in p.name]
        if content == "folder":
            chain.rmdir()
    assert calls["n"] == 0


# -- 4. every output location is checked before the first theory call ----------------------------------
def test_unwritable_chain_folder(write_config, tmp_path, capsys, calls):
    cfg, _ = write_config()
    blocker = tmp_path / "blocker"
    blocker.write_text("a file where a folder should be\n")
    assert main(["run", str(cfg), "--chain", str(blocker / "chains" / "x.h5")]) == 2
    one_line(capsys, "blocker", "cannot create the output folder")
    assert calls["n"] == 0 and blocker.read_text().startswith("a file")


@pytest.mark.parametrize("kind", ["under-a-file", "is-a-file"])
def test_unwritable_summary_folder_is_found_before_the_run(write_config, tmp_path, capsys, calls, kind):
    cfg, chain = write_config(steps=10, check_every=10)
    blocker = tmp_path / "blocker"
    blocker.write_text("keep me\n")
    summary = blocker / "summary" if kind == "under-a-file" else blocker
    cfg.write_text(cfg.read_text().replace("[output]\n", f'[output]\nsummary = "{summary}"\n'))
    assert main(["run", str(cfg), "--summarize"]) == 2
    one_line(capsys, "summary folder")
    assert calls["n"] == 0 and not chain.exists() and blocker.read_text() == "keep me\n"


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_read_only_summary_folder(write_config, tmp_path, capsys, calls):
    cfg, chain = write_config(steps=10, check_every=10)
    locked = tmp_path / "locked"
    locked.mkdir()
    locked.chmod(0o500)
    try:
        cfg.write_text(cfg.read_text().replace("[output]\n", f'[output]\nsummary = "{locked / "s"}"\n'))
        assert main(["run", str(cfg), "--summarize"]) == 2
        one_line(capsys, "summary folder", "not writable")
    finally:
        locked.chmod(0o700)
    assert calls["n"] == 0 and not chain.exists()


def test_unwritable_simulate_output(tmp_path, capsys, calls):
    blocker = tmp_path / "blocker"
    blocker.write_text("keep me\n")
    assert main(["simulate", str(SPEC), str(blocker / "out.h5")]) == 2
    one_line(capsys, "cannot create the output folder")
    assert calls["n"] == 0 and blocker.read_text() == "keep me\n"


def test_simulate_replace_overwrites_only_a_dataset(tmp_path, small_chain, capsys, calls):
    """`infer simulate --replace` overwrites an infer dataset, never a chain, a folder or another file."""
    folder = tmp_path / "folder.h5"
    folder.mkdir()
    notes = tmp_path / "notes.h5"
    notes.write_text("keep me\n")
    chain_bytes = small_chain.read_bytes()
    for target, words in ((folder, "not a file"), (notes, "not an HDF5 file"), (small_chain, "not an infer dataset")):
        assert main(["simulate", str(SPEC), str(target), "--replace"]) == 2
        one_line(capsys, str(target), "--replace", words)
    assert small_chain.read_bytes() == chain_bytes and notes.read_text() == "keep me\n" and folder.is_dir()
    assert calls["n"] == 0


def test_simulate_replace_still_overwrites_a_dataset(tmp_path, capsys):
    out = tmp_path / "mock.h5"
    assert main(["simulate", str(SPEC), str(out)]) == 0
    assert main(["simulate", str(SPEC), str(out)]) == 2
    one_line(capsys, "already exists")
    assert main(["simulate", str(SPEC), str(out), "--replace", "--seed", "3"]) == 0


# -- 5. an unreadable chain is unreadable, not damaged ----------------------------------------------------
@pytest.fixture
def small_chain(write_config):
    cfg, chain = write_config(steps=10, check_every=10)
    assert main(["--quiet", "run", str(cfg)]) == 0
    return chain


def test_unreadable_chain_is_reported_as_unreadable(small_chain, capsys, monkeypatch):
    real_access = os.access

    def no_read(path, mode, *a, **k):
        if Path(path).resolve() == small_chain.resolve() and mode & os.R_OK:
            return False
        return real_access(path, mode, *a, **k)
    monkeypatch.setattr(os, "access", no_read)
    before = small_chain.read_bytes()
    for argv in (["status", str(small_chain)], ["summarize", str(small_chain)],
                 ["resume", str(small_chain), "--steps", "20"]):
        assert main(argv) == 2
        line = one_line(capsys, str(small_chain), "permission denied")
        assert "salvage" not in line and "damaged" not in line
    assert small_chain.read_bytes() == before


@pytest.mark.skipif(os.geteuid() == 0, reason="root reads files without read permission")
def test_chmod_000_chain(small_chain, capsys):
    small_chain.chmod(0)
    try:
        assert main(["status", str(small_chain)]) == 2
        line = one_line(capsys, "permission denied")
        assert "salvage" not in line
    finally:
        small_chain.chmod(0o644)


# -- 6. a closed pipe ends the output quietly -----------------------------------------------------------
def test_status_into_a_closed_pipe_exits_quietly(small_chain):
    assert EXIT_PIPE == 128 + signal.SIGPIPE
    read_end, write_end = os.pipe()
    os.close(read_end)                               # the reader has gone before the first line
    try:
        r = subprocess.run([sys.executable, "-m", "infer", "status", str(small_chain), "--params"],
                           stdout=write_end, stderr=subprocess.PIPE, text=True, timeout=120)
    finally:
        os.close(write_end)
    assert r.returncode == EXIT_PIPE, r.stderr
    assert r.stderr == "", r.stderr


def test_status_piped_to_head(small_chain):
    r = subprocess.run(f'"{sys.executable}" -m infer status "{small_chain}" --params | head -1',
                       shell=True, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0
    assert len(r.stdout.splitlines()) == 1 and r.stdout.startswith("chain")
    assert "error" not in r.stderr and "Exception" not in r.stderr, r.stderr
