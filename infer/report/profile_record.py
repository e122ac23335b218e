"""The files of a profile likelihood (`infer.fit.profile`): its record (HDF5, our layout), its Markdown
table and the protection of the output folder (only our own, unchanged files are replaced)."""
from __future__ import annotations

import math

import numpy as np

from infer.errors import UserError
from infer.fit.profile import ProfileResult

# -- files and tables --------------------------------------------------------------------------------------
FORMAT = "infer-profile"
FORMAT_VERSION = 1
#: Files of a profile in its output folder: profile-PARAM.h5 (the grid), .md (the table), .png (the figure).
KINDS = ("record", "table", "figure")
_SUFFIX = {"record": ".h5", "table": ".md", "figure": ".png"}


def output_paths(outdir, param: str) -> dict:
    from pathlib import Path
    d = Path(outdir).expanduser().resolve()
    return {k: d / f"profile-{param}{_SUFFIX[k]}" for k in KINDS}


def _sha256(path) -> str:
    import hashlib
    return hashlib.sha256(path.read_bytes()).hexdigest()


def check_outputs(outdir, param: str, replace: bool) -> dict:
    """Before any theory call: the folder exists or can be made and is writable; an existing file of the
    profile is replaced only with ``replace``, and only when the record is ours and the table and figure
    are unchanged since it wrote them (their SHA-256 digests are kept in the record)."""
    import os
    from infer import paths as ipaths
    from infer.store.hdf5io import attr_str
    out = output_paths(outdir, param)
    d = out["record"].parent
    if os.path.lexists(d) and not d.is_dir():
        raise UserError(f"{d}: the output path exists and is not a folder")
    ipaths.file_folder(out["record"])
    present = [p for p in out.values() if os.path.lexists(p)]
    if present and not replace:
        raise UserError(f"{present[0]} already exists (pass --replace to overwrite an earlier profile)")
    if present:
        if ipaths.hdf5_format(out["record"]) != FORMAT:
            raise UserError(f"{out['record']} is not a profile record written by infer; refusing to replace "
                            "the profile files in {d}")
        import h5py
        import json
        with h5py.File(out["record"], "r", locking=False) as f:
            digests = json.loads(attr_str(f, "digests", "{}"))
        for kind in ("table", "figure"):
            p = out[kind]
            if os.path.lexists(p) and (p.is_symlink() or not p.is_file() or digests.get(kind) != _sha256(p)):
                raise UserError(f"{p} was not written by the earlier profile (or was changed since); "
                                "move it away or choose another folder")
    return out


def write_record(result: ProfileResult, path, digests: dict, run: dict) -> None:
    """The grid and its intervals as HDF5 (written atomically)."""
    import json
    import h5py
    from infer import __version__
    from infer.atomic import write_atomic
    from infer.store.hdf5io import checked, fixed_strs

    def fill(tmp):
        with h5py.File(tmp, "w") as f:
            f.attrs.update({"format": FORMAT, "format_version": FORMAT_VERSION, "infer_version": __version__,
                            "parameter": result.param, "mode": result.mode, "digests": json.dumps(digests),
                            "best_fit_neg2": result.best_neg2, "minimum_neg2": result.minimum,
                            "laplace_sigma": result.best_sigma, "run": json.dumps(run, default=str),
                            "best_fit": json.dumps(result.best), "notes": json.dumps(result.notes),
                            "surrogate": json.dumps(result.surrogate, default=float)})
            checked(f, "names", fixed_strs(result.names))
            for key, value in (("grid", result.grid), ("neg2_log_like", result.neg2), ("delta_chi2", result.dchi2),
                               ("optimum", result.points), ("converged", result.converged.astype(np.int8)),
                               ("exact_calls", result.calls), ("surrogate_error", result.surrogate_error)):
                checked(f, key, value)
            g = f.create_group("intervals")
            for iv in result.intervals():
                g.attrs[f"{iv.level:g}"] = json.dumps({"lower": iv.lower, "upper": iv.upper,
                                                       "lower_edge": iv.lower_edge, "upper_edge": iv.upper_edge})
    write_atomic(path, fill)


def read_record(path) -> dict:
    """A profile record as plain arrays and values."""
    import json
    import h5py
    from infer.store.hdf5io import attr_str, strs_from
    with h5py.File(path, "r", locking=False) as f:
        if attr_str(f, "format") != FORMAT:
            raise UserError(f"{path}: not a profile record written by infer")
        out = {k: f[k][()] for k in ("grid", "neg2_log_like", "delta_chi2", "optimum", "converged",
                                     "exact_calls", "surrogate_error")}
        out["names"] = strs_from(f["names"])
        out.update({k: attr_str(f, k) for k in ("parameter", "mode")})
        out["intervals"] = {k: json.loads(v) for k, v in f["intervals"].attrs.items()}
        out["best_fit"] = json.loads(attr_str(f, "best_fit"))
    return out


def table(result: ProfileResult, marginal: dict | None = None) -> str:
    """The profile as Markdown: intervals, minimum and curvature, then the grid."""
    fmt = ".6g"
    psi, sig = result.parabola()
    what = "−2 ln L" if result.mode == "likelihood" else "−2 ln L + Gaussian prior χ²"
    lines = [f"# Profile likelihood of {result.param}", "",
             f"{what} minimised over {', '.join(n for n in result.names if n != result.param)} "
             f"(prior supports as bounds) at {len(result.grid)} values of {result.param}.", "",
             "| quantity | value |", "|---|---|",
             f"| global best fit {result.param} | {result.best[result.param]:{fmt}} (Laplace σ {result.best_sigma:.4g}) |",
             f"| profile minimum (parabola through the lowest 3 points) | {psi:{fmt}} |",
             f"| σ from the profile's curvature | {sig:.4g} |",
             f"| minimum {what} | {result.minimum:.4f} |"]
    for iv, cl in zip(result.intervals(), ("68.3 %", "95 %")):
        lines.append(f"| Δχ² ≤ {iv.level:g} ({cl} by Wilks' theorem) | {iv.text(fmt)} |")
    if marginal:
        for key, val in marginal.items():
            lines.append(f"| {key} | {val} |")
    lines.append(f"| exact calls | {result.total_calls} ({result.fit_calls} global fit"
                 + (" and surrogate design" if result.surrogate and result.surrogate.get("design_calls") else "")
                 + f", {int(result.calls.sum())} on the grid) |")
    if result.surrogate:
        ho = result.surrogate.get("held_out", {})
        err = result.surrogate_error[np.isfinite(result.surrogate_error)]
        lines.append(f"| surrogate proposals | {result.surrogate['source']}; held-out RMS Δχ² "
                     f"{ho.get('rms_dchi2', math.nan):.2g}; at the proposals |surrogate − exact| ≤ "
                     f"{(np.max(np.abs(err)) if err.size else math.nan):.2g} in −2 ln L (every reported value is exact) |")
    lines += ["", "| " + result.param + f" | Δχ² | {what} | converged | exact calls |"
              + (" surrogate − exact |" if result.surrogate else ""),
              "|---|---|---|---|---|" + ("---|" if result.surrogate else "")]
    for j in range(len(result.grid)):
        row = (f"| {result.grid[j]:{fmt}} | {result.dchi2[j]:.4f} | {result.neg2[j]:.4f} | "
               f"{'yes' if result.converged[j] else 'NO'} | {result.calls[j]} |")
        if result.surrogate:
            row += f" {result.surrogate_error[j]:.3g} |"
        lines.append(row)
    if result.notes:
        lines += [""] + [f"Note: {n}." for n in result.notes]
    lines += ["", "Edges: an interval end marked 'grid edge' lies beyond the grid (widen --range); 'prior bound' "
              "means the profile is still below the level where the prior support ends (a one-sided limit)."]
    return "\n".join(lines) + "\n"
