"""CAMB against CLASS across a prior box: how much do the two Boltzmann codes disagree where a fit looks?

For ΛCDM and for each extension, ``--points`` scrambled-Sobol points (Owen-scrambled Sobol sequence,
scipy.stats.qmc; Sobol 1967, USSR Comput. Math. Math. Phys. 7, 86) fill a box of ±2 Fisher σ of the Kestrel
demo around its fiducial point (the σ are the demo's starting-ball spreads, configs/kestrel_demo.toml) and
the extension's own range. At each point CAMB (the demo's preset) computes the spectra from θ_*; CLASS (the
matching preset) computes them at the H₀ CAMB solved for, so both codes see the same cosmology. Printed per
model: the median and largest |Δχ²| with Δχ² = χ²_CAMB − χ²_CLASS on the demo data set
(configs/data/kestrel_bandpowers.h5 cut as the demo cuts it, calibration at 1), the median χ² for scale, the
largest |Δχ²| among the points near the fit (χ²_CAMB < `NEAR_CHI2`), and the largest |ΔD_ℓ/D_ℓ| of TT and EE over the data's ℓ range. The table also goes to
benchmarks/bench_cross_code.out.txt.

``--presets`` instead measures CLASS's accuracy presets against `infer.theory.classy.REFERENCE` at the
fiducial ΛCDM point (ℓ_max 2000; the reference call costs minutes).

    OMP_NUM_THREADS=1 python benchmarks/bench_cross_code.py [--points 20] [--models lcdm,mnu,...] [--jobs 2]
    OMP_NUM_THREADS=1 python benchmarks/bench_cross_code.py --presets
    OMP_NUM_THREADS=1 python benchmarks/bench_cross_code.py --fiducial

``--fiducial`` prints χ² at the Kestrel fiducial for CAMB (standard, high) and CLASS (standard, high, reference)
and the separation δᵀC⁻¹δ of each CLASS–CAMB pair of model band powers: Δχ² = −δᵀC⁻¹δ + 2 rᵀC⁻¹δ with r the
data's residual from the CAMB model, so on one noise realisation Δχ² carries a term (the same at every point
near the fit) that δᵀC⁻¹δ does not.
"""
from __future__ import annotations

import argparse
import json
import math
import sys
import time
import warnings
from pathlib import Path

import numpy as np
from scipy.stats import qmc

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from infer import config  # noqa: E402
from infer.model.likelihood import BandPowerLikelihood  # noqa: E402
from infer.model.posterior import load_data  # noqa: E402
from infer.theory import TheoryError, make_theory  # noqa: E402

DEMO = ROOT / "configs" / "kestrel_demo.toml"
OUT = ROOT / "benchmarks" / "bench_cross_code.out.txt"
#: The Kestrel fiducial (configs/kestrel.toml) with θ_* in place of H₀ (CAMB's θ_* at H₀ = 67.5: 1.04154).
CENTRE = {"omega_b": 0.0224, "omega_c": 0.120, "theta_star_100": 1.04154, "ln_As_1e10": 3.05, "n_s": 0.965}
#: Box half-widths: ``BOX_SIGMA`` × the Fisher-forecast σ of each base parameter (the demo's spreads).
BOX_SIGMA = 2.0
HALF = {k: BOX_SIGMA * s for k, s in {"omega_b": 0.00016, "omega_c": 0.0015, "theta_star_100": 0.0003,
                                      "ln_As_1e10": 0.016, "n_s": 0.0046}.items()}
TAU = 0.055
#: "Near the fit": χ²_CAMB below this (the fiducial point has χ² = 178 for the 147 bands; Δχ² = 120 above it is far
#: beyond any posterior region — 27 is the 99.99 % region for six parameters — yet keeps a few points per model).
NEAR_CHI2 = 300.0
#: Each model's extra parameters and their ranges.
MODELS = {
    "lcdm": {},
    "mnu": {"sum_mnu_eV": (0.0, 0.6)},
    "neff": {"n_eff": (2.6, 3.8)},
    "w0wa": {"w0": (-1.3, -0.7), "wa": (-0.8, 0.4)},
    "omegak": {"omega_k": (-0.05, 0.05)},
    "r": {"r": (0.0, 0.2)},
    "nrun": {"n_run": (-0.03, 0.03)},
    "alens": {"a_lens": (0.8, 1.3)},
}


def box_points(model: str, n: int, seed: int = 11) -> list[dict]:
    """``n`` scrambled-Sobol points of the box of ``model`` (base parameters, then its extension)."""
    names = list(CENTRE) + list(MODELS[model])
    lo = np.array([CENTRE[k] - HALF[k] for k in CENTRE] + [a for a, _ in MODELS[model].values()])
    hi = np.array([CENTRE[k] + HALF[k] for k in CENTRE] + [b for _, b in MODELS[model].values()])
    with warnings.catch_warnings():           # n need not be a power of two for this use
        warnings.simplefilter("ignore", UserWarning)
        u = qmc.Sobol(len(names), scramble=True, seed=seed).random(n)
    return [dict(zip(names, map(float, row)), tau=TAU) for row in qmc.scale(u, lo, hi)]


def demo_likelihood():
    cfg = config.load(DEMO)
    data = load_data(cfg)
    return cfg, data, BandPowerLikelihood(data, cfg.sections.get("likelihood"))


def compare(point: dict, camb, klass, like, lo: int) -> dict:
    """χ² and spectrum deviations of both codes at one point (CLASS at CAMB's H₀)."""
    a = camb.compute(point)
    b_in = {k: v for k, v in point.items() if k != "theta_star_100"} | {"H0": a.derived["H0"]}
    b = klass.compute(b_in)
    out = {"H0": a.derived["H0"], "chi2_camb": like.chi2(like.model(a)), "chi2_class": like.chi2(like.model(b))}
    for k in ("TT", "EE"):
        out[k] = float(np.max(np.abs(b.dl[k][lo:] / a.dl[k][lo:] - 1.0)))
    return out


def run_grid(models, n, camb_preset, class_preset, log=print, save=None):
    cfg, data, like = demo_likelihood()
    ell_max, lo = data.ell_max_needed, int(cfg.dataset.get("ell_min", 30))
    camb = make_theory({"code": "camb", "accuracy": camb_preset}, ell_max)
    klass = make_theory({"code": "class", "accuracy": class_preset}, ell_max)
    rows = []
    for model in models:
        res, failed, t0 = [], 0, time.time()
        done = {}
        if save and Path(save).exists():         # resume: reuse the records of an interrupted run
            done = {r["i"]: r for r in map(json.loads, Path(save).read_text().splitlines()) if r["model"] == model}
        for i, p in enumerate(box_points(model, n)):
            if i in done:
                res.append(done[i])
                continue
            try:
                r = compare(p, camb, klass, like, lo)
            except TheoryError as err:
                failed += 1
                log(f"  {model} point {i}: {err.reason} ({err.detail[:80]})")
                continue
            res.append(r)
            if save:
                with open(save, "a") as fh:
                    fh.write(json.dumps({"model": model, "i": i, **p, **r}) + "\n")
            log(f"  {model} {i:2d} H0 {r['H0']:.2f} chi2 CAMB {r['chi2_camb']:9.2f} CLASS {r['chi2_class']:9.2f} "
                f"dchi2 {r['chi2_camb'] - r['chi2_class']:+.3f} TT {r['TT']:.1e} EE {r['EE']:.1e}")
        rows.append(summarise(model, res, failed, time.time() - t0))
    return rows, data, ell_max, lo


def summarise(model, res, failed, seconds):
    """One table row from the points of one model."""
    d = np.array([r["chi2_camb"] - r["chi2_class"] for r in res])
    near = np.array([r["chi2_camb"] < NEAR_CHI2 for r in res], bool)
    return {"model": model, "n": len(res), "failed": failed, "near_n": int(near.sum()),
            "near_max": float(np.max(np.abs(d[near]))) if near.any() else math.nan,
            "med": float(np.median(np.abs(d))) if d.size else math.nan,
            "max": float(np.max(np.abs(d))) if d.size else math.nan,
            "mean": float(np.mean(d)) if d.size else math.nan,
            "chi2": float(np.median([r["chi2_camb"] for r in res])) if res else math.nan,
            "TT": max((r["TT"] for r in res), default=math.nan),
            "EE": max((r["EE"] for r in res), default=math.nan), "seconds": seconds}


def _one_model(job):
    model, n, camb_preset, class_preset, save = job
    rows, data, ell_max, lo = run_grid([model], n, camb_preset, class_preset, log=lambda s: print(s, flush=True),
                                       save=save)
    return rows[0], len(data.value), tuple(data.spectra), ell_max, lo


def run_parallel(models, n, camb_preset, class_preset, jobs, save=None):
    """`run_grid` with one model per worker process (each builds its own backends)."""
    from concurrent.futures import ProcessPoolExecutor
    with ProcessPoolExecutor(max_workers=jobs) as pool:
        out = list(pool.map(_one_model, [(m, n[m], camb_preset, class_preset, save) for m in models]))
    return [o[0] for o in out], out[0][1:]


def table(rows, n_bands, spectra, ell_max, lo, n, camb_preset, class_preset) -> str:
    ext = sorted({v for m, v in n.items() if m != "lcdm"})
    n_text = ", ".join(([f"{n['lcdm']} ΛCDM"] if "lcdm" in n else []) + [f"{'/'.join(map(str, ext))} per extension"] * bool(ext))
    head = (f"CAMB ({camb_preset}) − CLASS ({class_preset}) on the Kestrel demo data ({n_bands} bands, "
            f"{', '.join(spectra)}, ℓ {lo}–{ell_max}); {n_text} scrambled-Sobol points, ±{BOX_SIGMA:g}σ box\n")
    cols = (f"{'model':8s} {'points':>6s} {'failed':>6s} {'median χ²':>10s} {'med |Δχ²|':>10s} {'max |Δχ²|':>10s} "
            f"{'mean Δχ²':>9s} {'near pts':>8s} {'near max':>8s} {'max TT dev':>10s} {'max EE dev':>10s} {'wall s':>7s}")
    head += (f"Δχ² = χ²_CAMB − χ²_CLASS at the same parameters; 'near': the points with χ²_CAMB < {NEAR_CHI2:g}; "
             "max TT/EE dev: largest |D_ℓ(CLASS)/D_ℓ(CAMB) − 1| over the data's ℓ range\n")
    lines = [head, cols, "-" * len(cols)]
    for r in rows:
        lines.append(f"{r['model']:8s} {r['n']:6d} {r['failed']:6d} {r['chi2']:10.1f} {r['med']:10.3f} "
                     f"{r['max']:10.3f} {r['mean']:+9.3f} {r['near_n']:8d} {r['near_max']:8.3f} {r['TT']:10.2e} {r['EE']:10.2e} "
                     + (f"{r['seconds']:7.0f}" if math.isfinite(r["seconds"]) else f"{'–':>7s}"))
    return "\n".join(lines) + "\n"


def presets(ell_max: int = 2000, lo: int = 30) -> str:
    from infer.theory.classy import ClassTheory
    fid = {"omega_b": 0.0224, "omega_c": 0.120, "H0": 67.5, "ln_As_1e10": 3.05, "n_s": 0.965, "tau": TAU}
    t0 = time.process_time()
    ref = ClassTheory.reference(ell_max).compute(fid)
    lines = [f"CLASS presets against REFERENCE (CPU {time.process_time() - t0:.0f} s) at the Kestrel fiducial, "
             f"max |ΔD_ℓ/D_ℓ| over ℓ {lo}–1500 / {lo}–{ell_max}",
             f"{'preset':9s} {'CPU s':>6s} {'TT 1500':>9s} {'TT 2000':>9s} {'EE 1500':>9s} {'EE 2000':>9s}"]
    for name in ("fast", "standard", "high"):
        t0 = time.process_time()
        s = make_theory({"code": "class", "accuracy": name}, ell_max).compute(fid)
        cpu = time.process_time() - t0
        dev = {k: np.abs(s.dl[k] / np.where(ref.dl[k] == 0, 1, ref.dl[k]) - 1) for k in ("TT", "EE")}
        lines.append(f"{name:9s} {cpu:6.1f} " + " ".join(f"{dev[k][lo:top + 1].max():9.1e}"
                                                         for k in ("TT", "EE") for top in (1500, ell_max)))
    return "\n".join(lines) + "\n"


def fiducial() -> str:
    """χ² at the Kestrel fiducial for both codes at several presets, and the codes' separation δᵀC⁻¹δ (δ: the
    difference of their model band powers) — the part of Δχ² that does not depend on the noise realisation."""
    from infer.theory.classy import ClassTheory
    cfg, data, like = demo_likelihood()
    ell_max = data.ell_max_needed
    fid = {"omega_b": 0.0224, "omega_c": 0.120, "H0": 67.5, "ln_As_1e10": 3.05, "n_s": 0.965, "tau": TAU}
    runs = [("CAMB standard", make_theory({"code": "camb", "accuracy": "standard"}, ell_max)),
            ("CAMB high", make_theory({"code": "camb", "accuracy": "high"}, ell_max)),
            ("CLASS standard", make_theory({"code": "class", "accuracy": "standard"}, ell_max)),
            ("CLASS high", make_theory({"code": "class", "accuracy": "high"}, ell_max)),
            ("CLASS reference", ClassTheory.reference(ell_max))]
    bands, lines = {}, [f"At the Kestrel fiducial (ℓ {int(cfg.dataset.get('ell_min', 30))}–{ell_max}, "
                        f"{len(data.value)} bands): χ² per code and preset"]
    for name, theory in runs:
        t0 = time.process_time()
        bands[name] = like.model(theory.compute(fid))
        lines.append(f"  {name:16s} χ² {like.chi2(bands[name]):8.3f}   (CPU {time.process_time() - t0:.1f} s)")
    lines.append("separation δᵀC⁻¹δ of the model band powers")
    for a in ("CLASS standard", "CLASS high", "CLASS reference"):
        for b in ("CAMB standard", "CAMB high"):
            z = like.whiten(bands[b]) - like.whiten(bands[a])          # L⁻¹(d − m_b) − L⁻¹(d − m_a) = L⁻¹ δ
            lines.append(f"  {a:16s} − {b:14s} {float(z @ z):7.3f}")
    return "\n".join(lines) + "\n"


def from_records(path, n):
    """Table rows rebuilt from the per-point records a run appended to ``path`` (``--save``): the first
    ``n[model]`` points of each model; a point without a record failed (only successes are recorded)."""
    recs = [json.loads(line) for line in Path(path).read_text().splitlines() if line.strip()]
    rows = []
    for m, count in n.items():
        res = list({r["i"]: r for r in recs if r["model"] == m and r["i"] < count}.values())
        rows.append(summarise(m, res, count - len(res), math.nan))
    return rows


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--points", type=int, default=20, help="points per model")
    ap.add_argument("--ext-points", type=int, default=None, help="points per extension (default: --points)")
    ap.add_argument("--models", default=",".join(MODELS))
    ap.add_argument("--camb", default="standard", help="CAMB preset (the demo's: standard)")
    ap.add_argument("--class", dest="klass", default="standard", help="CLASS preset")
    ap.add_argument("--presets", action="store_true", help="measure CLASS's presets instead")
    ap.add_argument("--fiducial", action="store_true", help="χ² and the codes' separation at the fiducial")
    ap.add_argument("--jobs", type=int, default=1, help="worker processes (one model each)")
    ap.add_argument("--save", default=None, help="append each point's record (JSON lines) to this file")
    ap.add_argument("--table-from", default=None, help="only print the table of the records in this file")
    ap.add_argument("--out", default=str(OUT))
    args = ap.parse_args(argv)
    if args.presets or args.fiducial:
        print(presets() if args.presets else fiducial())
        return
    models = [m for m in args.models.split(",") if m]
    unknown = [m for m in models if m not in MODELS]
    if unknown:
        ap.error(f"unknown model(s) {unknown}; choose from {', '.join(MODELS)}")
    n = {m: args.points if m == "lcdm" or args.ext_points is None else args.ext_points for m in models}
    if args.table_from:
        rows = from_records(args.table_from, n)
        _, data, _ = demo_likelihood()
        meta = (len(data.value), tuple(data.spectra), data.ell_max_needed, 30)
    else:
        rows, meta = run_parallel(models, n, args.camb, args.klass, args.jobs, args.save)
    text = table(rows, *meta, n, args.camb, args.klass)
    print(text)
    Path(args.out).write_text(text + "\ncommand: OMP_NUM_THREADS=1 python benchmarks/bench_cross_code.py "
                              + " ".join(argv if argv is not None else sys.argv[1:]) + "\n")


if __name__ == "__main__":
    main()
