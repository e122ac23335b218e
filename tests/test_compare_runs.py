"""``infer compare``: overlay, side-by-side table, shift significance and Bayes factors of real runs.

References: the closed-form posterior of the linear-Gaussian template model (common practice; mean and
covariance of a Gaussian likelihood linear in the parameters, with the Gaussian prior on a_4 of
configs/quick.toml) gives the Gaussian shift statistic Q = Δμᵀ(C_A + C_B)⁻¹Δμ that the runs must
reproduce, with scipy.stats.chi2 (PyPI) for its probability; Raveri & Hu 2019 (PRD 99, 043506) for the
difference posterior. For Bayes factors: two uniform priors on a well-constrained parameter differing in
width by a factor 2 give ln B = ln 2 for the narrower one (the evidence scales as the inverse prior volume;
common practice).
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from infer import data as dataset
from infer.analysis.marginals import constraints
from infer.cli import main
from infer.commands.compare import compare_files
from infer.report.export import load_run
from infer.report.rounding import format_value
from infer.theory.templates import TemplateTheory

REPO = Path(__file__).resolve().parents[1]
QUICK = (REPO / "configs" / "quick.toml").read_text()
DATA = REPO / "configs" / "data" / "quick_bandpowers.h5"
STEPS = 300
SHIFT_A1 = 0.2                # ≈ 8 posterior sd of a_1 in the shipped data set


def run_file(folder: Path, name: str, *, seed=12345, data=DATA, fix_a4=False, engine=False, a1_prior=None) -> Path:
    """configs/quick.toml with another name, seed, data set, a fixed a_4, or the surrogate engine."""
    text = QUICK.replace('name = "quick"', f'name = "{name}"').replace("seed = 12345", f"seed = {seed}")
    text = text.replace('file = "data/quick_bandpowers.h5"', f'file = "{data}"')
    text = text.replace("steps = 2000", f"steps = {STEPS}")
    if fix_a4:
        start = text.index("[parameters.a_4]")
        end = text.index("[sampling]")
        text = text[:start] + "[parameters.a_4]\nvalue = 1.0\n\n" + text[end:]
    if a1_prior:
        text = text.replace("[parameters.a_1]\nprior = { uniform = [0.0, 3.0] }",
                            f"[parameters.a_1]\nprior = {{ uniform = {a1_prior} }}")
    if engine:
        text = text.replace("[sampling]\n", '[sampling]\nengine = "surrogate"\n', 1)
        text = text.replace("ess_above = 2000", "ess_above = 600")
        text += "\n[surrogate]\nround_size = 128\nbatch = 16\nevidence_draws = 20000\n"
    text += f'\n[output]\nchain = "{folder / (name + ".h5")}"\n'
    path = folder / f"{name}.toml"
    path.write_text(text)
    return path


def shifted_dataset(folder: Path) -> Path:
    """A second mock data set of the invented quick experiment with a_1 raised by SHIFT_A1 (other noise)."""
    spec = (REPO / "configs" / "quick_experiment.toml").read_text()
    spec = spec.replace("a_1 = 1.0", f"a_1 = {1.0 + SHIFT_A1}")
    path = folder / "shifted_experiment.toml"
    path.write_text(spec)
    out = folder / "shifted_bandpowers.h5"
    assert main(["--quiet", "simulate", str(path), str(out), "--seed", "8"]) == 0
    return out


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    folder = tmp_path_factory.mktemp("compare")
    shifted = shifted_dataset(folder)
    made = {}
    for name, kw in (("seed-a", {"seed": 1}), ("seed-b", {"seed": 2}), ("shifted", {"seed": 3, "data": shifted}),
                     ("fixed-a4", {"seed": 4, "fix_a4": True})):
        assert main(["--quiet", "run", str(run_file(folder, name, **kw))]) == 0
        made[name] = folder / f"{name}.h5"
    made["shifted_data"] = shifted
    return made


def closed_form(data_path: Path):
    """Mean and covariance of the template amplitudes' posterior for quick.toml's priors (flat on a_1..a_3,
    normal(1, 0.5) on a_4; the flat priors' edges lie far outside the posterior)."""
    bp = dataset.load(data_path)
    A = TemplateTheory(bp.ell_max_needed, {}).design_matrix(bp.kind, bp.window_ell, bp.window)
    cinv = np.linalg.inv(bp.covariance)
    prec = A.T @ cinv @ A + np.diag([0, 0, 0, 1 / 0.5 ** 2])
    cov = np.linalg.inv(prec)
    return cov @ (A.T @ cinv @ bp.value + np.array([0, 0, 0, 1 / 0.5 ** 2])), cov


@pytest.mark.slow
def test_two_seeds_on_one_data_set_show_no_shift_and_the_table_holds_each_runs_numbers(runs, tmp_path):
    out = tmp_path / "cmp"
    text = compare_files([runs["seed-a"], runs["seed-b"]], out, pairs=4000)
    md = (out / "comparison.md").read_text()
    tex = (out / "comparison.tex").read_text()
    assert (out / "overlay.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    row = next(line for line in md.splitlines() if line.startswith("| seed-a − seed-b |"))
    sigma = float(row.split("|")[2].split("σ")[0].strip().lstrip("> "))
    assert sigma < 2.0, row                       # Monte Carlo noise only: far below 2σ
    assert "Same data in seed-a − seed-b" in md and "[same data" in text
    assert "assumes the two runs are independent" in md
    assert "no evidence estimate in seed-a and seed-b" in md
    # each run's column holds that run's own constraints (infer.analysis.marginals), rounded as the summary
    for name in ("seed-a", "seed-b"):
        assert f"| {name} |" in md.split("## Mean")[0]
    ra, rb = load_run(runs["seed-a"]), load_run(runs["seed-b"])
    ca = {c.name: c for c in constraints(ra.samples, ra.burn)[0]}
    cb = {c.name: c for c in constraints(rb.samples, rb.burn)[0]}
    for name in ("a_1", "a_2", "a_3", "a_4", "a_sum", "chi2"):
        line = next(line for line in md.splitlines() if line.startswith(f"| `{name}` |"))
        cells = [c.strip() for c in line.split("|")[2:4]]
        assert cells == [format_value(ca[name].mean, ca[name].sd, tex=False),
                         format_value(cb[name].mean, cb[name].sd, tex=False)], line
        assert f"${format_value(ca[name].mean, ca[name].sd)}$ & ${format_value(cb[name].mean, cb[name].sd)}$" in tex
    assert r"Quantity & seed-a & seed-b \\" in tex and r"$\Sigma a$" in tex
    # a second comparison into the same folder replaces the files it wrote itself
    compare_files([runs["seed-b"], runs["seed-a"]], out, pairs=1000)
    assert "| seed-b − seed-a |" in (out / "comparison.md").read_text()


@pytest.mark.slow
def test_shifted_data_give_a_large_shift_matching_the_closed_form(runs, tmp_path):
    from infer.analysis.compare import pair_shifts
    ra, rc = load_run(runs["seed-a"]), load_run(runs["shifted"])
    names = list(ra.names)
    (s,) = pair_shifts([("a", ra.kept, "x"), ("c", rc.kept, "y")], names, pairs=4000)
    ma, ca = closed_form(DATA)
    mc, cc = closed_form(runs["shifted_data"])
    dm = ma - mc
    q_true = float(dm @ np.linalg.solve(ca + cc, dm))
    assert q_true > 20                                           # the set-up: a large shift
    # sample means/covariances of ~10⁴ correlated draws: a few per cent on Q
    assert s.result.q == pytest.approx(q_true, rel=0.15)
    assert s.result.pte == pytest.approx(stats.chi2(4).sf(s.result.q), rel=1e-9)     # scipy.stats.chi2
    assert s.result.sigma > 3.0 and not s.same_data              # Raveri–Hu: beyond 3σ (or a lower bound)
    md_dir = tmp_path / "cmp"
    compare_files([runs["seed-a"], runs["shifted"]], md_dir, pairs=4000)
    row = next(line for line in (md_dir / "comparison.md").read_text().splitlines()
               if line.startswith("| seed-a − shifted |"))
    assert float(row.split("|")[2].split("σ")[0].strip().lstrip("> ")) > 3.0


def _one_line_error(capsys, code):
    err = capsys.readouterr().err
    assert code == 2 and err.startswith("infer: error: ") and err.count("\n") == 1 and "Traceback" not in err
    return err


@pytest.mark.slow
def test_different_parameter_sets_are_refused_unless_params_names_common_ones(runs, tmp_path, capsys):
    out = tmp_path / "cmp"
    err = _one_line_error(capsys, main(["--quiet", "compare", str(runs["seed-a"]), str(runs["fixed-a4"]),
                                        "--out", str(out)]))
    assert "different parameter sets" in err and "a_4" in err and "fixed-a4 lacks a_4" in err
    assert not (out / "comparison.md").exists()
    err = _one_line_error(capsys, main(["--quiet", "compare", str(runs["seed-a"]), str(runs["fixed-a4"]),
                                        "--out", str(out), "--params", "a_1,a_4"]))
    assert "fixed-a4 lacks a_4" in err
    assert main(["--quiet", "compare", str(runs["seed-a"]), str(runs["fixed-a4"]), "--out", str(out),
                 "--params", "a_1,a_2", "--pairs", "1000"]) == 0
    md = (out / "comparison.md").read_text()
    assert "| `a_1` |" in md and "| `a_3` |" not in md
    # a derived sum with its terms: the difference covariance is singular, refused (files kept as they were)
    err = _one_line_error(capsys, main(["--quiet", "compare", str(runs["seed-a"]), str(runs["seed-b"]),
                                        "--out", str(out), "--params", "a_1,a_2,a_3,a_4,a_sum"]))
    assert "degenerate" in err and (out / "comparison.md").read_text() == md


def test_bad_compare_input_is_one_line_and_touches_nothing(tmp_path, capsys):
    out = tmp_path / "cmp"
    out.mkdir()
    (out / "comparison.md").write_text("my notes\n")
    _one_line_error(capsys, main(["--quiet", "compare", str(tmp_path / "a.h5"), "--out", str(out)]))
    err = _one_line_error(capsys, main(["--quiet", "compare", str(tmp_path / "a.h5"), str(tmp_path / "b.h5"),
                                        "--out", str(out)]))
    assert "comparison.md" in err                           # the user's file is found before any chain is read
    assert (out / "comparison.md").read_text() == "my notes\n"
    err = _one_line_error(capsys, main(["--quiet", "compare", str(tmp_path / "a.h5"), str(tmp_path / "b.h5"),
                                        "--out", str(tmp_path / "new")]))
    assert "a.h5" in err
    _one_line_error(capsys, main(["--quiet", "compare", "x.h5", "y.h5", "--out", str(out), "--pairs", "10"]))


@pytest.mark.slow
def test_bayes_factor_of_two_prior_widths_is_the_prior_volume_ratio(tmp_path):
    """Surrogate-engine runs on one data set, a_1 uniform on [0, 3] and on [0, 6]: ln B = ln 2."""
    for name, prior in (("narrow", "[0.0, 3.0]"), ("wide", "[0.0, 6.0]")):
        assert main(["--quiet", "run", str(run_file(tmp_path, name, engine=True, a1_prior=prior))]) == 0
    text = compare_files([tmp_path / "narrow.h5", tmp_path / "wide.h5"], tmp_path / "cmp", pairs=1000)
    from infer.analysis.compare import bayes_factors
    from infer.commands.compare import data_id
    rn, rw = load_run(tmp_path / "narrow.h5"), load_run(tmp_path / "wide.h5")
    (bf,) = bayes_factors([("narrow", rn.ln_z, data_id(rn)), ("wide", rw.ln_z, data_id(rw))])
    assert bf.ln_b == pytest.approx(math.log(2.0), abs=4 * bf.error + 0.02), (bf.ln_b, bf.error)
    assert bf.error == pytest.approx(math.hypot(rn.ln_z[1], rw.ln_z[1]))
    assert f"ln B(narrow / wide) = {bf.ln_b:.2f} ± {bf.error:.2f}" in text
    md = (tmp_path / "cmp" / "comparison.md").read_text()
    assert "| narrow over wide |" in md and "favouring narrow |" in md
