"""Malformed input files, as a hostile user writes them: run files, datasets, covariances, experiment specs.

The README's promise for bad input, checked case by case: ``infer check RUN`` (or ``infer simulate SPEC
OUT``) exits 2 with exactly one line on stderr, ``infer: error: …``, that names the file and the key or
field at fault; no theory call is made; and no file in the folder is created, changed or removed.

A theory call is made visible twice: in-process, `TemplateTheory.compute` is replaced by a function that
records the call and raises an exception of its own (which would end the command with exit 1, not 2);
and every run file carries the template model's fault injection ``fault = { parameter = "a_1",
above = -1e9, action = "exit" }``, which ends the process with status 3 at the first call — checked in
subprocesses for a sample of the cases and for the valid control file (which must reach the theory).
"""
from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import warnings
from pathlib import Path

import h5py
import numpy as np
import pytest

from infer.cli import main
from infer.theory.templates import TemplateTheory

from conftest import quick_config_text

REPO = Path(__file__).resolve().parents[1]
FAULT = 'fault = { parameter = "a_1", above = -1e9, action = "exit" }'


class TheoryCalled(Exception):
    """Raised by the patched theory: a bad input reached a theory call."""


@pytest.fixture
def no_theory(monkeypatch):
    calls = []

    def compute(self, params):
        calls.append(dict(params))
        raise TheoryCalled("the theory was called")

    monkeypatch.setattr(TemplateTheory, "compute", compute)
    return calls


def snapshot(folder: Path) -> dict:
    """Every entry under ``folder``: kind, size, modification time and content digest."""
    out = {}
    for root, dirs, files in os.walk(folder, followlinks=False):
        for name in dirs + files:
            p = Path(root) / name
            st = os.lstat(p)
            digest = None
            if p.is_file() and not p.is_symlink() and os.access(p, os.R_OK):
                digest = hashlib.sha256(p.read_bytes()).hexdigest()
            out[str(p)] = (st.st_mode, st.st_size, st.st_mtime_ns, digest)
    return out


# ------------------------------------------------------------------------------------------- files

def write_h5(path: Path, **changes):
    """A valid 4-band dataset in our HDF5 layout, written by hand with h5py; ``changes`` replace fields
    ('bands/ell_hi' = array) or attributes ('@format_version' = value)."""
    ell = np.arange(0, 131)
    lo, hi = np.array([30, 50, 70, 90]), np.array([49, 69, 89, 109])
    window = np.zeros((4, ell.size))
    for b in range(4):
        window[b, lo[b]:hi[b] + 1] = 1.0 / (hi[b] - lo[b] + 1)
    fields = {"bands/kind": np.array(["TT"] * 4, dtype="S2"), "bands/ell_lo": lo, "bands/ell_hi": hi,
              "bands/ell_eff": 0.5 * (lo + hi), "bands/value": np.full(4, 3000.0),
              "windows/ell": ell, "windows/weight": window, "covariance": np.eye(4) * 100.0}
    attrs = {"format": "infer-bandpowers", "format_version": 1, "experiment": "Toy", "units": "Dl_uK2"}
    for key, val in changes.items():
        (attrs if key.startswith("@") else fields)[key.lstrip("@")] = val
    with h5py.File(path, "w") as h5:
        for k, v in attrs.items():
            h5.attrs[k] = v
        for k, v in fields.items():
            h5.create_dataset(k, data=v)
    return path


TABLE = "# kind ell_lo ell_hi value\nTT 30 49 3000.0\nTT 50 69 2900.0\nTT 70 89 2800.0\n"


def plain_setup(table=TABLE, cov=None, cov_name="cov.txt", dataset_keys=None):
    """A run file on a plain table; ``cov``: text for a text covariance, bytes to write raw, or a
    callable(path) that makes the covariance file itself."""
    def setup(tmp: Path):
        if isinstance(table, bytes):
            (tmp / "bands.txt").write_bytes(table)
        else:
            (tmp / "bands.txt").write_text(table)
        cov_path = tmp / cov_name
        if cov is None:
            np.savetxt(cov_path, np.eye(3) * 100.0)
        elif callable(cov):
            cov(cov_path)
        elif isinstance(cov, bytes):
            cov_path.write_bytes(cov)
        else:
            cov_path.write_text(cov)
        if dataset_keys is not None:
            return dataset_keys.replace("TMP/", str(tmp) + os.sep)
        return f'file = "{tmp / "bands.txt"}"\ncovariance = "{cov_path}"\nunits = "Dl_uK2"'
    return setup


def run_text(data: Path, chain: Path, dataset_keys=None) -> str:
    text = quick_config_text(data, chain, theory_extra=FAULT)
    if dataset_keys is not None:
        text = text.replace(f'file = "{data}"', dataset_keys)
    return text


# --------------------------------------------------------------------------- run-file edit cases
# (id, text to replace, replacement, words that must be in the line besides the run file's path)

RUN_EDITS = [
    ("seed-above-int64", "seed = 11", "seed = 9223372036854775808", ["run.seed"]),
    ("seed-float", "seed = 11", "seed = 1.5", ["run.seed"]),
    ("seed-bool", "seed = 11", "seed = true", ["run.seed"]),
    ("name-with-space", 'name = "quick-test"', 'name = "quick test"', ["run.name"]),
    ("run-unknown-key", "seed = 11", "seed = 11\nsede = 3", ["run.sede"]),
    ("spectra-duplicate", "[theory]", 'spectra = ["TT", "TT"]\n[theory]', ["dataset.spectra", "twice"]),
    ("spectra-unknown", "[theory]", 'spectra = ["TB"]\n[theory]', ["dataset.spectra"]),
    ("spectra-string", "[theory]", 'spectra = "TT"\n[theory]', ["dataset.spectra"]),
    ("spectra-empty", "[theory]", "spectra = []\n[theory]", ["dataset.spectra"]),
    ("ell-min-above-max", "[theory]", "ell_min = 500\nell_max = 100\n[theory]", ["dataset.ell_min", "ell_max"]),
    ("ell-max-absurd", "[theory]", "ell_max = 1000000000000\n[theory]", ["dataset.ell_max"]),
    ("ell-min-float", "[theory]", "ell_min = 30.5\n[theory]", ["dataset.ell_min"]),
    ("units-unknown", "[theory]", 'units = "Kelvin"\n[theory]', ["dataset.units"]),
    ("covariance-for-hdf5", "[theory]", 'covariance = "cov.npy"\n[theory]', ["dataset.covariance"]),
    ("dataset-unknown-key", "[theory]", 'fiel = "x.h5"\n[theory]', ["dataset.fiel"]),
    ("walkers-odd", "walkers = 16", "walkers = 17", ["sampling.walkers"]),
    ("walkers-absurd", "walkers = 16", "walkers = 1000000000", ["sampling.walkers"]),
    ("ensembles-zero", "ensembles = 2", "ensembles = 0", ["sampling.ensembles"]),
    ("steps-float", "steps = 400", "steps = 4e2", ["sampling.steps"]),
    ("steps-zero", "steps = 400", "steps = 0", ["sampling.steps"]),
    ("moves-unknown", 'moves = "de-snooker"', 'moves = "teleport"', ["sampling.moves"]),
    ("workers-negative", "workers = 0", "workers = -1", ["sampling.workers"]),
    ("checkpoint-minutes-inf", "checkpoint_steps = 25", "checkpoint_steps = 25\ncheckpoint_minutes = inf",
     ["sampling.checkpoint_minutes"]),
    ("checkpoint-minutes-huge", "checkpoint_steps = 25", "checkpoint_steps = 25\ncheckpoint_minutes = 1e308",
     ["sampling.checkpoint_minutes"]),
    ("log-minutes-zero", "checkpoint_steps = 25", "checkpoint_steps = 25\nlog_minutes = 0",
     ["sampling.log_minutes"]),
    ("checkpoint-steps-bool", "checkpoint_steps = 25", "checkpoint_steps = true", ["sampling.checkpoint_steps"]),
    ("rhat-one", "rhat_below = 1.01", "rhat_below = 1.0", ["stopping.rhat_below"]),
    ("rhat-nan", "rhat_below = 1.01", "rhat_below = nan", ["stopping.rhat_below"]),
    ("ess-absurd", "ess_above = 1e9", "ess_above = 1e300", ["stopping.ess_above"]),
    ("ess-negative", "ess_above = 1e9", "ess_above = -5.0", ["stopping.ess_above"]),
    ("tau-multiple-negative", "check_every = 50", "check_every = 50\ntau_multiple = -1", ["stopping.tau_multiple"]),
    ("check-every-zero", "check_every = 50", "check_every = 0", ["stopping.check_every"]),
    ("min-steps-text", "check_every = 50", 'check_every = 50\nmin_steps = "many"', ["stopping.min_steps"]),
    ("time-limit-minutes-75", "check_every = 50", 'check_every = 50\ntime_limit = "1:75:00"',
     ["stopping.time_limit", "75 minutes"]),
    ("time-limit-seconds-99", "check_every = 50", 'check_every = 50\ntime_limit = "1:00:99"',
     ["stopping.time_limit", "99 seconds"]),
    ("time-limit-hours-after-days", "check_every = 50", 'check_every = 50\ntime_limit = "2-25:00:00"',
     ["stopping.time_limit", "25 hours"]),
    ("time-limit-zero", "check_every = 50", 'check_every = 50\ntime_limit = "0:00:00"', ["stopping.time_limit"]),
    ("time-limit-centuries", "check_every = 50", 'check_every = 50\ntime_limit = "99999999999999999999d"',
     ["stopping.time_limit"]),
    ("time-limit-bool", "check_every = 50", "check_every = 50\ntime_limit = true", ["stopping.time_limit"]),
    ("truncnormal-no-mass", "prior = { uniform = [0.0, 3.0] }\nguess = 1.0",
     "prior = { normal = [0.0, 1e-3], range = [5.0, 6.0] }\nguess = 5.5", ["parameters.a_1.prior", "mass"]),
    ("uniform-width-overflows", "prior = { uniform = [0.0, 3.0] }", "prior = { uniform = [-1e308, 1e308] }",
     ["parameters.a_1.prior", "too wide"]),
    ("normal-range-width-overflows", "prior = { uniform = [0.0, 3.0] }",
     "prior = { normal = [1.0, 1.0], range = [-1e308, 1e308] }", ["parameters.a_1.prior.range", "too wide"]),
    ("normal-sd-overflows", "prior = { uniform = [0.0, 3.0] }", "prior = { normal = [1.0, 1e308] }",
     ["parameters.a_1.prior.normal"]),
    ("normal-sd-zero", "prior = { uniform = [0.0, 3.0] }", "prior = { normal = [1.0, 0.0] }",
     ["parameters.a_1.prior.normal"]),
    ("prior-bound-inf", "prior = { uniform = [0.0, 3.0] }", "prior = { uniform = [0.0, inf] }",
     ["parameters.a_1.prior.uniform"]),
    ("prior-not-table", "prior = { uniform = [0.0, 3.0] }", "prior = 3.0", ["parameters.a_1.prior"]),
    ("prior-three-numbers", "prior = { uniform = [0.0, 3.0] }", "prior = { uniform = [0.0, 1.0, 3.0] }",
     ["parameters.a_1.prior.uniform"]),
    ("spread-zero", "spread = 0.05", "spread = 0.0", ["parameters.a_1.spread"]),
    ("spread-inf", "spread = 0.05", "spread = inf", ["parameters.a_1.spread"]),
    ("spread-wider-than-prior", "spread = 0.05", "spread = 1e308", ["parameters.a_1.spread", "wider"]),
    ("guess-text", "guess = 1.0", 'guess = "one"', ["parameters.a_1.guess"]),
    ("tex-two-lines", "tex = 'a_1'", 'tex = "a\\nb"', ["parameters.a_1.tex"]),
    ("tex-number", "tex = 'a_1'", "tex = 5", ["parameters.a_1.tex"]),
    ("tex-nul", "tex = 'a_1'", 'tex = "a\\u0000"', ["parameters.a_1.tex"]),
    ("param-unknown-key", "tex = 'a_1'", "tex = 'a_1'\nlatex = 'a'", ["parameters.a_1.latex"]),
    ("param-not-table", "tex = 'a_4'", "tex = 'a_4'\n[parameters]\na_5 = 3", ["[parameters.a_5]", "table"]),
    ("chain-is-dataset", None, "chain = DATA", ["output.chain", "dataset"]),
    ("chain-not-h5", None, 'chain = "out.txt"', ["output.chain"]),
    ("chain-empty", None, 'chain = ""', ["output.chain"]),
    ("output-unknown-key", None, 'chian = "x.h5"', ["output.chian"]),
    ("theory-code-number", 'code = "templates"', "code = 5", ["theory.code"]),
    ("theory-code-unknown", 'code = "templates"', 'code = "boltzmann9"', ["'code'"]),
    ("theory-no-code", 'code = "templates"', "", ["[theory]", "code"]),
    ("theory-delay-text", FAULT, FAULT + '\ndelay_seconds = "slow"', ["delay_seconds"]),
    ("theory-unknown-key", FAULT, FAULT + "\nspeed = 3", ["speed"]),
    ("unknown-section", "[sampling]", "[sampler]", ["[sampler]"]),
    ("not-toml", "walkers = 16", "walkers = = 16", ["not valid TOML"]),
    ("run-not-table", '[run]\nname = "quick-test"\nseed = 11\n', "run = 3\n", ["[run]", "table"]),
]


@pytest.mark.parametrize("old, new, words", [c[1:] for c in RUN_EDITS], ids=[c[0] for c in RUN_EDITS])
def test_bad_run_file(tmp_path, quick_data, no_theory, capsys, old, new, words):
    chain = tmp_path / "chains" / "run.h5"
    text = run_text(quick_data, chain)
    if old is None:                                    # an [output] edit
        old = f'chain = "{chain}"'
        new = new.replace("DATA", f'"{quick_data}"')
    assert old in text, old
    cfg = tmp_path / "run.toml"
    cfg.write_text(text.replace(old, new, 1))
    assert_rejected(["check", str(cfg)], tmp_path, capsys, no_theory, [str(cfg), *words],
                    also_unchanged=quick_data)


def assert_rejected(argv, folder: Path, capsys, calls, words, also_unchanged=None):
    before = snapshot(folder)
    extra = snapshot(also_unchanged.parent) if also_unchanged is not None else None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        code = main(argv)
    captured = capsys.readouterr()
    shown = [w for w in caught if issubclass(w.category, (UserWarning, RuntimeWarning))]
    assert not shown, [str(w.message) for w in shown]            # e.g. NumPy's "input contained no data"
    lines = [ln for ln in captured.err.splitlines() if ln.strip()]
    assert calls == [], "a theory call was made"
    assert code == 2, captured.err
    assert len(lines) == 1, captured.err
    line = lines[0]
    assert line.startswith("infer: error: "), line
    assert "Traceback" not in captured.err and "Warning" not in captured.err, captured.err
    for w in words:
        assert w in line, (w, line)
    assert snapshot(folder) == before, "a file was created, changed or removed"
    if extra is not None:
        assert snapshot(also_unchanged.parent) == extra


# --------------------------------------------------------------------- dataset and covariance cases
# (id, setup(tmp) -> [dataset] keys, words that must be in the line ("TMP/" = the case's folder))

def _h5(**changes):
    def setup(tmp):
        write_h5(tmp / "d.h5", **changes)
        return f'file = "{tmp / "d.h5"}"'
    return setup


def _symlink_loop(name):
    def setup(tmp):
        os.symlink(tmp / f"{name}.b", tmp / name)
        os.symlink(tmp / name, tmp / f"{name}.b")
        return f'file = "{tmp / name}"'
    return setup


def _directory(name):
    def setup(tmp):
        (tmp / name).mkdir()
        return f'file = "{tmp / name}"'
    return setup


def _junk(name, content: bytes):
    def setup(tmp):
        (tmp / name).write_bytes(content)
        return f'file = "{tmp / name}"'
    return setup


def _npy_objects(path):
    np.save(path, np.array([{"evil": 1}], dtype=object), allow_pickle=True)


def _npy_3d(path):
    np.save(path, np.ones((3, 3, 3)))


def _npy_wrong_n(path):
    np.save(path, np.eye(4))


def _npy_strings(path):
    np.save(path, np.array([["a", "b"], ["c", "d"]]))


def _npy_truncated(path):
    np.save(path, np.eye(3) * 100.0)
    path.write_bytes(path.read_bytes()[:-20])


def _dir(path):
    path.mkdir()


def _loop(path):
    os.symlink(str(path) + ".b", path)
    os.symlink(path, str(path) + ".b")


DATA_CASES = [
    ("h5-ell-hi-absurd", _h5(**{"bands/ell_hi": np.array([49, 69, 89, 10**12])}), ["TMP/d.h5", "bands/ell_hi"]),
    ("h5-window-ell-absurd", _h5(**{"windows/ell": np.arange(0, 131) + 10**12}), ["TMP/d.h5", "windows/ell"]),
    ("h5-ell-lo-1e300", _h5(**{"bands/ell_lo": np.array([30.0, 50.0, 70.0, 1e300])}), ["TMP/d.h5", "bands/ell_lo"]),
    ("h5-version-text", _h5(**{"@format_version": "one"}), ["TMP/d.h5", "format_version"]),
    ("h5-version-array", _h5(**{"@format_version": np.arange(40)}), ["TMP/d.h5", "format_version"]),
    ("h5-experiment-array", _h5(**{"@experiment": np.ones((4, 4, 4))}), ["TMP/d.h5", "'experiment'"]),
    ("h5-experiment-two-lines", _h5(**{"@experiment": "Toy\nline two"}), ["TMP/d.h5", "'experiment'"]),
    ("h5-kind-numbers", _h5(**{"bands/kind": np.arange(4)}), ["TMP/d.h5", "bands/kind"]),
    ("h5-cov-nan", _h5(covariance=np.full((4, 4), np.nan)), ["TMP/d.h5", "covariance"]),
    ("h5-not-hdf5", _junk("d.h5", b"this is not HDF5 at all"), ["TMP/d.h5", "HDF5"]),
    ("h5-empty-file", _junk("d.h5", b""), ["TMP/d.h5"]),
    ("h5-directory", _directory("d.h5"), ["TMP/d.h5", "directory"]),
    ("h5-symlink-loop", _symlink_loop("d.h5"), ["TMP/d.h5", "dataset.file", "symbolic links"]),
    ("h5-missing", lambda tmp: f'file = "{tmp / "absent.h5"}"', ["TMP/absent.h5", "not found"]),
    ("unknown-suffix", _junk("d.fits", b"SIMPLE"), ["TMP/d.fits", "suffix"]),
    ("text-ell-hi-absurd", plain_setup(TABLE.replace("TT 70 89", "TT 70 1e12")),
     ["TMP/bands.txt", "column ell_hi", "100000"]),
    ("text-ell-hi-overflow", plain_setup(TABLE.replace("TT 70 89", "TT 70 1e400")), ["TMP/bands.txt", "column ell_hi"]),
    ("text-value-word", plain_setup(TABLE.replace("2900.0", "lots")), ["TMP/bands.txt", "column value"]),
    ("text-no-header", plain_setup("TT 30 49 3000.0\n"), ["TMP/bands.txt", "header"]),
    ("text-not-utf8", plain_setup(TABLE.encode().replace(b"TT 50", b"\xff\xfe 50")), ["TMP/bands.txt", "UTF-8"]),
    ("text-needs-covariance", plain_setup(dataset_keys='file = "TMP/bands.txt"\nunits = "Dl_uK2"'),
     ["dataset.covariance"]),
    ("text-needs-units", plain_setup(dataset_keys='file = "TMP/bands.txt"\ncovariance = "TMP/cov.txt"'),
     ["dataset.units"]),
    ("cov-empty-text", plain_setup(cov=""), ["TMP/cov.txt", "covariance", "no numbers"]),
    ("cov-comments-only", plain_setup(cov="# nothing here\n\n"), ["TMP/cov.txt", "no numbers"]),
    ("cov-ragged-text", plain_setup(cov="1 0 0\n0 1\n0 0 1\n"), ["TMP/cov.txt", "covariance"]),
    ("cov-words", plain_setup(cov="a b c\nd e f\ng h i\n"), ["TMP/cov.txt", "covariance"]),
    ("cov-binary-text", plain_setup(cov=b"\x00\xff\xfe\x93"), ["TMP/cov.txt", "covariance"]),
    ("cov-wrong-n-text", plain_setup(cov="1 0\n0 1\n"), ["TMP/cov.txt", "shape"]),
    ("cov-npy-is-text", plain_setup(cov="1 0 0\n0 1 0\n0 0 1\n", cov_name="cov.npy"),
     ["TMP/cov.npy", "not a NumPy .npy file"]),
    ("cov-npy-objects", plain_setup(cov=_npy_objects, cov_name="cov.npy"), ["TMP/cov.npy", "Python objects"]),
    ("cov-npy-3d", plain_setup(cov=_npy_3d, cov_name="cov.npy"), ["TMP/cov.npy", "2-dimensional"]),
    ("cov-npy-wrong-n", plain_setup(cov=_npy_wrong_n, cov_name="cov.npy"), ["TMP/cov.npy", "shape"]),
    ("cov-npy-strings", plain_setup(cov=_npy_strings, cov_name="cov.npy"), ["TMP/cov.npy", "not numbers"]),
    ("cov-npy-truncated", plain_setup(cov=_npy_truncated, cov_name="cov.npy"), ["TMP/cov.npy", "truncated"]),
    ("cov-npz-named-npy", plain_setup(cov=lambda p: p.write_bytes(b"PK\x03\x04" + b"\x00" * 40), cov_name="cov.npy"),
     ["TMP/cov.npy", "not a NumPy .npy file"]),
    ("cov-directory", plain_setup(cov=_dir, cov_name="cov.npy"), ["TMP/cov.npy", "directory"]),
    ("cov-symlink-loop", plain_setup(cov=_loop, cov_name="cov.npy"), ["TMP/cov.npy", "dataset.covariance"]),
    ("cov-missing", plain_setup(cov=lambda p: None, cov_name="cov.npy"), ["TMP/cov.npy", "not found"]),
    ("cov-unknown-suffix", plain_setup(cov="1", cov_name="cov.fits"), ["TMP/cov.fits", "suffix"]),
    ("cov-not-positive", plain_setup(cov="1 2 0\n2 1 0\n0 0 1\n"), ["TMP/cov.txt", "positive definite"]),
    ("cut-leaves-nothing", lambda tmp: _h5()(tmp) + "\nell_min = 5000", ["TMP/d.h5", "no band is left"]),
    ("cut-absent-spectrum", lambda tmp: _h5()(tmp) + '\nspectra = ["EE"]', ["TMP/d.h5", "no EE bands"]),
]


@pytest.mark.parametrize("setup, words", [c[1:] for c in DATA_CASES], ids=[c[0] for c in DATA_CASES])
def test_bad_dataset_or_covariance(tmp_path, no_theory, capsys, setup, words):
    keys = setup(tmp_path)
    cfg = tmp_path / "run.toml"
    cfg.write_text(run_text(Path("PLACEHOLDER"), tmp_path / "chains" / "run.h5", dataset_keys=keys))
    words = [w.replace("TMP/", str(tmp_path) + os.sep) for w in words]
    assert_rejected(["check", str(cfg)], tmp_path, capsys, no_theory, words)


@pytest.mark.skipif(os.geteuid() == 0, reason="permissions do not stop root")
def test_unreadable_dataset(tmp_path, no_theory, capsys):
    data = write_h5(tmp_path / "d.h5")
    data.chmod(0)
    cfg = tmp_path / "run.toml"
    cfg.write_text(run_text(data, tmp_path / "chains" / "run.h5"))
    try:
        assert_rejected(["check", str(cfg)], tmp_path, capsys, no_theory, [str(data), "permission denied"])
    finally:
        data.chmod(0o644)


# ------------------------------------------------------------------------------ experiment specs

SPEC = """\
[experiment]
name = "Toy"
fsky = 0.5
noise_uK_arcmin = 20.0
beam_fwhm_arcmin = 4.0
ell_min = 30
ell_max = 329
bin_width = 30
spectra = ["TT", "EE"]

[fiducial]
a_1 = 1.0
a_2 = 1.0
a_3 = 1.0
a_4 = 1.0

[mock]
seed = 4

[theory]
code = "templates"
""" + FAULT + "\n"

SPEC_EDITS = [
    ("fsky-zero", "fsky = 0.5", "fsky = 0.0", ["experiment.fsky"]),
    ("fsky-text", "fsky = 0.5", 'fsky = "half"', ["experiment.fsky"]),
    ("fsky-above-one", "fsky = 0.5", "fsky = 1.5", ["experiment.fsky"]),
    ("fsky-subnormal", "fsky = 0.5", "fsky = 1e-320", ["experiment.fsky"]),
    ("noise-overflows", "noise_uK_arcmin = 20.0", "noise_uK_arcmin = 1e200", ["experiment.noise_uK_arcmin"]),
    ("pol-factor-overflows", "bin_width = 30", "bin_width = 30\npol_noise_factor = 1e308",
     ["experiment.pol_noise_factor"]),
    ("name-nul", 'name = "Toy"', 'name = "To\\u0000y"', ["experiment.name"]),
    ("description-nul", "seed = 4", 'seed = 4\ndescription = "a\\u0000b"', ["mock.description"]),
    ("noise-nan", "noise_uK_arcmin = 20.0", "noise_uK_arcmin = nan", ["experiment.noise_uK_arcmin"]),
    ("noise-negative", "noise_uK_arcmin = 20.0", "noise_uK_arcmin = -1.0", ["experiment.noise_uK_arcmin"]),
    ("beam-overflows", "beam_fwhm_arcmin = 4.0", "beam_fwhm_arcmin = 10000.0", ["experiment.beam_fwhm_arcmin"]),
    ("ell-max-absurd", "ell_max = 329", "ell_max = 1000000000000", ["experiment.ell_max"]),
    ("too-many-bands", "ell_max = 329\nbin_width = 30", "ell_max = 100000\nbin_width = 1",
     ["experiment.bin_width", "bands"]),
    ("ell-min-above-max", "ell_min = 30", "ell_min = 400", ["experiment.ell_max"]),
    ("ell-min-float", "ell_min = 30", "ell_min = 30.5", ["experiment.ell_min"]),
    ("bin-width-zero", "bin_width = 30", "bin_width = 0", ["experiment.bin_width"]),
    ("pol-factor-zero", "bin_width = 30", "bin_width = 30\npol_noise_factor = 0.0", ["experiment.pol_noise_factor"]),
    ("spectra-duplicate", 'spectra = ["TT", "EE"]', 'spectra = ["TT", "TT"]', ["experiment.spectra", "twice"]),
    ("spectra-unknown", 'spectra = ["TT", "EE"]', 'spectra = ["TT", "TB"]', ["experiment.spectra"]),
    ("name-empty", 'name = "Toy"', 'name = ""', ["experiment.name"]),
    ("name-missing", 'name = "Toy"\n', "", ["experiment.name"]),
    ("experiment-unknown-key", "fsky = 0.5", "fsky = 0.5\nfksy = 0.4", ["experiment.fksy"]),
    ("fiducial-text", "a_1 = 1.0", 'a_1 = "one"', ["fiducial.a_1"]),
    ("fiducial-inf", "a_1 = 1.0", "a_1 = inf", ["fiducial.a_1"]),
    ("seed-above-int64", "seed = 4", "seed = 18446744073709551616", ["mock.seed"]),
    ("seed-negative", "seed = 4", "seed = -4", ["mock.seed"]),
    ("realise-text", "seed = 4", 'seed = 4\nrealise = "yes"', ["mock.realise"]),
    ("output-not-h5", "seed = 4", 'seed = 4\noutput = "mock.txt"', ["mock.output"]),
    ("output-empty", "seed = 4", 'seed = 4\noutput = ""', ["mock.output"]),
    ("mock-unknown-key", "seed = 4", "seed = 4\nspeed = 4", ["mock.speed"]),
    ("unknown-table", "[mock]", "[sampler]", ["sampler"]),
    ("theory-code-number", 'code = "templates"', "code = 5", ["theory.code"]),
    ("theory-unknown-key", FAULT, FAULT + "\nspeed = 3", ["speed"]),
    ("theory-lacks-input", "a_4 = 1.0\n", "", ["a_4"]),
    ("not-toml", "[mock]", "[mock", ["not valid TOML"]),
    ("camb-fiducial-unknown", '[theory]\ncode = "templates"\n' + FAULT + "\n", "",
     ["fiducial.a_1"]),                          # default theory camb: a_1 is not a ΛCDM parameter
]


@pytest.mark.parametrize("old, new, words", [c[1:] for c in SPEC_EDITS], ids=[c[0] for c in SPEC_EDITS])
def test_bad_experiment_spec(tmp_path, no_theory, capsys, old, new, words):
    assert old in SPEC, old
    spec = tmp_path / "toy.toml"
    spec.write_text(SPEC.replace(old, new, 1))
    out = tmp_path / "mock.h5"
    assert_rejected(["simulate", str(spec), str(out)], tmp_path, capsys, no_theory, [str(spec), *words])
    assert not out.exists()


SPEC_FILE_CASES = [
    ("spec-directory", lambda p: p.mkdir(), ["directory"]),
    ("spec-missing", lambda p: None, ["not found"]),
    ("spec-not-utf8", lambda p: p.write_bytes(b"[experiment]\nname = \"\xff\"\n"), ["UTF-8"]),
    ("spec-symlink-loop", _loop, ["symbolic links"]),
]


@pytest.mark.parametrize("make, words", [c[1:] for c in SPEC_FILE_CASES], ids=[c[0] for c in SPEC_FILE_CASES])
def test_bad_experiment_spec_file(tmp_path, no_theory, capsys, make, words):
    spec = tmp_path / "toy.toml"
    make(spec)
    out = tmp_path / "mock.h5"
    assert_rejected(["simulate", str(spec), str(out)], tmp_path, capsys, no_theory, [str(spec), *words])
    assert not out.exists()


def test_the_cases_are_many_and_the_control_files_are_valid(tmp_path, quick_data, no_theory, capsys):
    """The table holds at least 40 cases, and the unedited files pass every check and reach the theory
    (so each case fails for its own edit, and the patched theory does see calls)."""
    assert len(RUN_EDITS) + len(DATA_CASES) + len(SPEC_EDITS) + len(SPEC_FILE_CASES) >= 40
    cfg = tmp_path / "run.toml"
    cfg.write_text(run_text(quick_data, tmp_path / "chains" / "run.h5"))
    assert main(["check", str(cfg)]) == 1 and len(no_theory) == 1     # TheoryCalled: an internal error
    keys = plain_setup()(tmp_path)
    cfg.write_text(run_text(Path("PLACEHOLDER"), tmp_path / "chains" / "run.h5", dataset_keys=keys))
    assert main(["check", str(cfg)]) == 1 and len(no_theory) == 2
    spec = tmp_path / "toy.toml"
    spec.write_text(SPEC)
    assert main(["simulate", str(spec), str(tmp_path / "mock.h5")]) == 1 and len(no_theory) == 3
    capsys.readouterr()


# ---------------------------------------------------------- the same promise from the installed command

ENV = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
SUBPROCESS_CASES = ["truncnormal-no-mass", "uniform-width-overflows", "time-limit-minutes-75", "ess-absurd"]


@pytest.mark.parametrize("case", SUBPROCESS_CASES)
def test_installed_command_makes_no_theory_call(tmp_path, quick_data, case):
    # The fault injection ends the process with status 3 at the first theory call.
    _, old, new, words = next(c for c in RUN_EDITS if c[0] == case)
    cfg = tmp_path / "run.toml"
    good = run_text(quick_data, tmp_path / "chains" / "run.h5")
    cfg.write_text(good)
    control = subprocess.run([sys.executable, "-m", "infer", "check", str(cfg)], env=ENV,
                             capture_output=True, text=True, timeout=300)
    assert control.returncode == 3, control.stderr              # the unedited file reaches the theory
    cfg.write_text(good.replace(old, new, 1))
    before = snapshot(tmp_path)
    r = subprocess.run([sys.executable, "-m", "infer", "check", str(cfg)], env=ENV, capture_output=True,
                       text=True, timeout=300)
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("infer: error: ") and str(cfg) in lines[0], r.stderr
    assert all(w in lines[0] for w in words), lines[0]
    assert snapshot(tmp_path) == before
