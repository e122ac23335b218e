"""Export of a chain's draws: ArviZ InferenceData in NetCDF (``.nc``) or a plain table (``.csv``/``.txt``).

`load_run` is the one reader of a chain file of either engine into draws (the ensemble driver's chain,
`infer.store.chainfile`, or the surrogate engine's weighted exact sample, `infer.store.enginefile`); the
comparison (`infer.analysis.compare`, ``infer compare``) reads through it too. Burn-in is the summary's
rule (`infer.analysis.burnin.choose` with the run's ``[stopping] tau_multiple``; a number given with
``--burn`` is used as is); thinning keeps every k-th step after burn-in.

Layout of an ensemble chain in InferenceData (T kept steps, E ensembles of W walkers):

* ``posterior``: one variable per sampled and derived quantity, dims (chain, draw) with **chain = one
  walker** (E·W chains; chain c is walker c mod W of ensemble c // W, coordinates ``ensemble`` and
  ``walker`` on the chain dimension) and **draw = one kept step** (coordinate ``step``, 1-based in the
  full run). Each walker's trajectory is a sequence in time, as ArviZ's autocorrelation-based ESS
  assumes; ArviZ's bulk/tail ESS of this group is then exactly ours (which treats every walker as a
  sequence, `infer.analysis.diagnostics.all_diagnostics`). ArviZ's R̂ of the group, computed across
  walkers, is *not* ours: walkers of one ensemble move using each other's positions and are not
  independent chains, so our R̂ compares the independent ensembles (each ensemble's walkers flattened
  step-major). To reproduce ours: ``x.values.reshape(E, W, T).transpose(0, 2, 1).reshape(E, T * W)``
  passed to ``arviz.rhat``.
* ``sample_stats``: ``lp`` (ln posterior, the ArviZ schema's name) and ``ln_likelihood``.

A surrogate-engine sample is N exact draws with importance weights, which ArviZ's summary and plots
would ignore. It is exported as:

* ``exact_weighted`` (a group of our own, dim ``exact_draw``): every exact draw, each quantity, ``lp``,
  ``ln_likelihood``, ``ln_weight`` (unnormalised) and ``weight`` (normalised, Σ = 1); attributes the
  Kish ESS, Pareto k̂ and ln Z ± error. Estimates from it must use the weights.
* ``posterior``: an equal-weight resample of M = round(Kish ESS) draws (systematic resampling,
  Kitagawa 1996, J. Comp. Graph. Stat. 5, 1; seeded, then shuffled so that copies of one draw are not
  neighbours), one chain, so ArviZ's plots and means are of the weighted posterior. Its R̂ is
  meaningless (one chain of independent draws) and its ESS and MCSE describe the resample, not the
  importance-sampling error: the Monte Carlo errors that hold are those of ``infer summarize``
  (`infer.analysis.weighted.mcse`). The group's attributes say so.

The plain table has one row per draw (ensemble chains: step-major, then ensemble, then walker) and the
columns weight, ln_posterior, the sampled parameters, the derived quantities, written with 17
significant digits (read back bit for bit). Line 1 names the columns (commented, so
``numpy.loadtxt`` skips it and ``numpy.genfromtxt(..., names=True)`` reads it); a commented block
follows with the chain, run, layout, burn-in, each column's LaTeX label and the meaning of the weights.

Outputs are checked before the chain is read (`check_output`) and written atomically
(`infer.atomic.write_atomic`); ``replace`` overwrites only a file an earlier export wrote.
"""
from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from infer import __version__, paths
from infer.analysis import burnin
from infer.analysis.samples import Samples
from infer.analysis.weighted import WeightedSample
from infer.atomic import write_atomic
from infer.errors import UserError

#: The ``format`` attribute of an exported NetCDF file and the first words of a table's provenance line.
FORMAT = "infer-export"
FORMAT_VERSION = 1
MARK = "# infer export"
SUFFIXES = {".nc": "netcdf", ".csv": "csv", ".txt": "text"}
#: Steps an ensemble chain must hold before its draws are exported or compared (as the summary).
MIN_STEPS = 8


@dataclass
class Run:
    """A chain read for export or comparison: the kept draws and what they are."""

    path: str
    engine: str                                  # "ensemble" or "surrogate"
    name: str                                    # run name (the run file's [run] name), else the file stem
    kept: Samples | WeightedSample               # ensemble: after burn-in and thinning; surrogate: all draws
    samples: Samples | None = None               # ensemble: every step
    burn: burnin.BurnIn | None = None
    thin: int = 1
    cfg: object = None                           # the run file stored in the chain (`infer.config.Config`)
    provenance: dict = field(default_factory=dict)
    report: dict | None = None                   # surrogate: the engine's stored report (ESS, k̂, ln Z, ...)

    @property
    def weighted(self) -> bool:
        return isinstance(self.kept, WeightedSample)

    @property
    def names(self) -> tuple[str, ...]:
        return self.kept.names

    @property
    def all_names(self) -> tuple[str, ...]:
        return self.kept.all_names

    @property
    def ln_z(self) -> tuple[float, float] | None:
        """(ln Z, its error) when the run carries an evidence estimate (the surrogate engine's)."""
        rep = self.report or {}
        if rep.get("ln_z") is None or not np.isfinite(rep["ln_z"]):
            return None
        return float(rep["ln_z"]), float(rep.get("ln_z_err", float("nan")))

    def weights(self) -> np.ndarray:
        """Normalised weight of every kept draw, in the table's row order."""
        if self.weighted:
            return self.kept.weights
        n = self.kept.log_post.size
        return np.full(n, 1.0 / n)

    def column(self, name: str) -> np.ndarray:
        """Kept draws of one quantity, flat in the table's row order."""
        return np.asarray(self.kept.column(name), float).reshape(-1)


def weighted_sample(state, meta: dict | None = None) -> WeightedSample:
    """The `WeightedSample` of a surrogate-engine chain (`infer.store.enginefile.EngineState`) whose run
    has stopped at least once."""
    s = state.sample
    return WeightedSample(state.names, state.derived_names, s["position"], s["derived"], s["log_post"],
                          s["log_like"], s["log_weight"], dict(state.tex), dict(state.bounds), dict(meta or {}))


def load_run(chain, burn: int | None = None, thin: int = 1) -> Run:
    """Read the chain file ``chain`` (either engine) into its kept draws (module docstring).

    ``burn``: steps to discard (None: the summary's automatic rule); ``thin``: keep every ``thin``-th
    step after burn-in. Both apply to ensemble chains only; a surrogate-engine sample has no burn-in.
    """
    from infer.config import stored as stored_config
    from infer.store.chainfile import ChainStore
    from infer.store.enginefile import EngineFile, engine_of
    chain = str(chain)
    paths.readable(chain, "chain file")
    if isinstance(thin, bool) or int(thin) != thin or thin < 1:
        raise UserError(f"--thin must be a whole number >= 1, got {thin!r}")
    thin = int(thin)
    if engine_of(chain) == "surrogate":
        if burn is not None or thin != 1:
            raise UserError(f"{chain}: --burn and --thin apply to ensemble chains; a surrogate-engine sample "
                            "is independent weighted draws with no burn-in")
        state = EngineFile(chain).read()
        if state.sample is None:
            raise UserError(f"{chain}: the surrogate engine has not produced a weighted sample yet "
                            f"({state.calls_done} exact calls so far); resume it with `infer resume {chain}`")
        name = state.provenance.get("run_name") or Path(chain).stem
        meta = {"run": name, "experiment": state.provenance.get("experiment"), "chain": chain}
        return Run(chain, "surrogate", str(name), weighted_sample(state, meta), cfg=stored_config(state),
                   provenance=dict(state.provenance), report=dict(state.report or {}))
    state = ChainStore(chain).read()
    cfg = stored_config(state)
    s = state.samples
    if state.steps_done < MIN_STEPS:
        raise UserError(f"{chain}: only {state.steps_done} steps; nothing to export or compare yet")
    if burn is not None and not 0 <= burn < state.steps_done:
        raise UserError(f"{chain}: --burn must be between 0 and {state.steps_done - 1} for this chain, got {burn}")
    choice = burnin.choose(s, burn, tau_multiple=cfg.stopping.tau_multiple, source="set with --burn")
    if choice.burn >= s.steps:
        raise UserError(f"{chain}: a burn-in of {choice.burn} steps leaves nothing of {s.steps} steps")
    kept = s.rows(slice(choice.burn, None, thin))
    name = state.provenance.get("run_name") or Path(chain).stem
    return Run(chain, "ensemble", str(name), kept, samples=s, burn=choice, thin=thin, cfg=cfg,
               provenance=dict(state.provenance))


# -- output checks ------------------------------------------------------------------------------------


def _ours(path: Path, kind: str) -> bool:
    if kind == "netcdf":
        return paths.hdf5_format(path) == FORMAT
    try:
        with open(path, encoding="utf-8") as fh:
            head = [fh.readline() for _ in range(2)]
    except (OSError, UnicodeDecodeError):
        return False
    return any(line.startswith(MARK) for line in head)


def check_output(out, replace: bool = False, chain=None) -> tuple[Path, str]:
    """Check the output path before any work: its suffix chooses the kind (`SUFFIXES`); an existing file
    is refused unless ``replace`` is given and an earlier export wrote it; its folder is created and must be
    writable. Returns (path, kind)."""
    out = Path(out).expanduser()
    kind = SUFFIXES.get(out.suffix.lower())
    if kind is None:
        raise UserError(f"{out}: unknown export type {out.suffix or '(no suffix)'!r}; use .nc (ArviZ "
                        "InferenceData in NetCDF), .csv or .txt")
    if chain is not None and os.path.lexists(out) and Path(chain).resolve() == out.resolve():
        raise UserError(f"{out}: is the chain itself; choose another output file")
    if os.path.lexists(out):
        if not replace:
            raise UserError(f"{out} already exists (pass --replace to overwrite it)")
        if out.is_symlink() or not out.is_file() or not _ours(out, kind):
            raise UserError(f"{out} exists and was not written by `infer export`; --replace only overwrites "
                            "an earlier export: choose another path, or move the file yourself")
    paths.file_folder(out)
    if kind == "netcdf":
        arviz()
    return out, kind


def arviz():
    """The ArviZ module (the ``export`` extra), or a one-line error saying how to install it."""
    try:
        import arviz as az
        import h5netcdf  # noqa: F401 - the NetCDF-4 writer used (an ArviZ dependency)
    except ImportError:
        raise UserError("writing .nc needs ArviZ: pip install 'arviz>=0.17,<1' (the 'export' extra of infer)"
                        ) from None
    return az


# -- what the files say -----------------------------------------------------------------------------------


def layout(run: Run) -> str:
    """One sentence on which draws are exported and how (for both file kinds)."""
    if run.weighted:
        rep = run.report or {}
        return (f"surrogate engine: {run.kept.n} exact draws with importance weights (Kish ESS "
                f"{run.kept.ess:.0f}, Pareto k-hat {rep.get('khat', float('nan')):.2f})")
    steps, ens, walk = run.kept.position.shape[:3]
    return (f"ensemble sampler: {ens} ensemble{'s' if ens != 1 else ''} x {walk} walkers x {steps} steps kept "
            f"(burn-in {run.burn.burn} of {run.samples.steps} steps: {run.burn.rule()}; "
            f"{'every step' if run.thin == 1 else f'one step in {run.thin}'} after it)")


def _columns(run: Run) -> list[str]:
    cols = ["weight", "ln_posterior", *run.all_names]
    dup = sorted({c for c in cols if cols.count(c) > 1})
    if dup:
        raise UserError(f"{run.path}: quantity name(s) {', '.join(dup)} clash with the table's own columns")
    return cols


def table_header(run: Run, delimiter: str = " ") -> str:
    """The commented header of the plain table (module docstring): column names, then provenance."""
    cols = _columns(run)
    tex = run.kept.tex
    lines = ["# " + delimiter.join(cols),
             f"{MARK} (infer {__version__}, format {FORMAT_VERSION}): one row per draw",
             f"# chain: {os.path.abspath(run.path)}",
             f"# run: {run.name}",
             f"# draws: {layout(run)}"]
    if run.weighted:
        lines += ["# weight: normalised importance weight of the exact draw (sums to 1); every estimate must",
                  "#   use it (mean = sum of weight * value); 0 marks a draw outside the prior support"]
    else:
        lines += ["# weight: equal for every draw (1 / rows): draws of the ensemble sampler after burn-in;",
                  "#   rows are step-major, then ensemble, then walker"]
    lines.append("# columns (name, LaTeX label, kind):")
    for i, c in enumerate(cols, 1):
        if c == "weight":
            lab, kind = "w", "weight"
        elif c == "ln_posterior":
            lab, kind = r"\ln \mathcal{P}", "ln posterior (prior x likelihood, unnormalised)"
        elif c in run.names:
            b = run.kept.bounds.get(c)
            lab, kind = tex.get(c, c), "sampled" + (f", prior support [{b[0]:g}, {b[1]:g}]" if b else "")
        else:
            lab, kind = tex.get(c, c), "derived"
        lines.append(f"#   {i:>2}  {c}  ${lab}$  {kind}")
    return "\n".join(lines) + "\n"


#: Rows formatted at a time when a table is written (bounds the memory of a long chain's export).
BLOCK_ROWS = 50_000


def write_table(run: Run, fh, delimiter: str = " ") -> None:
    """Write the plain table of ``run``'s kept draws (header and rows, 17 significant digits) to the text
    file ``fh``, a block of rows at a time."""
    fh.write(table_header(run, delimiter))
    columns = [run.weights(), np.asarray(run.kept.log_post, float).reshape(-1)] + \
        [run.column(n) for n in run.all_names]
    for start in range(0, len(columns[0]), BLOCK_ROWS):
        block = np.column_stack([c[start:start + BLOCK_ROWS] for c in columns])
        np.savetxt(fh, block, fmt="%.17g", delimiter=delimiter)


def _resample(ws: WeightedSample, seed: int) -> np.ndarray:
    """Indices of an equal-weight resample of M = round(Kish ESS) draws (systematic, then shuffled)."""
    w = ws.weights
    m = int(min(max(1, round(ws.ess)), ws.n))
    rng = np.random.default_rng(seed)
    u = (rng.uniform() + np.arange(m)) / m
    cdf = np.cumsum(w)
    idx = np.minimum(np.searchsorted(cdf / cdf[-1], u, side="right"), ws.n - 1)
    return rng.permutation(idx)


def inference_data(run: Run, seed: int = 0):
    """``run`` as an `arviz.InferenceData` (module docstring for the layout)."""
    import xarray as xr
    az = arviz()
    k = run.kept
    tex = {n: k.label(n) for n in k.all_names}
    root = {"format": FORMAT, "format_version": FORMAT_VERSION, "infer_version": __version__,
            "source_chain": os.path.abspath(run.path), "run_name": run.name, "engine": run.engine,
            "draws": layout(run), "tex_labels": json.dumps(tex)}
    if run.weighted:
        n = k.n
        dims = ("exact_draw",)
        exact = {nm: (dims, k.column(nm).copy(), {"tex": tex[nm]}) for nm in k.all_names}
        exact.update({"lp": (dims, k.log_post), "ln_likelihood": (dims, k.log_like),
                      "ln_weight": (dims, k.log_weight), "weight": (dims, k.weights)})
        rep = run.report or {}
        lnz = run.ln_z or (float("nan"), float("nan"))
        ex = xr.Dataset(exact, coords={"exact_draw": np.arange(n)},
                        attrs={"meaning": "every exact draw of the surrogate engine with its importance weight; "
                                          "estimates must use 'weight' (normalised, sums to 1)",
                               "kish_ess": float(k.ess), "pareto_khat": float(rep.get("khat", np.nan)),
                               "ln_evidence": lnz[0], "ln_evidence_error": lnz[1]})
        idx = _resample(k, seed)
        post = {nm: (("chain", "draw"), k.column(nm)[idx][None, :], {"tex": tex[nm]}) for nm in k.all_names}
        coords = {"chain": [0], "draw": np.arange(len(idx)), "exact_draw_index": ("draw", idx)}
        posterior = xr.Dataset(post, coords=coords, attrs={
            "resampled": 1, "resample_seed": int(seed),
            "meaning": (f"equal-weight resample (systematic, {len(idx)} = round(Kish ESS) draws) of the weighted "
                        "exact draws in group 'exact_weighted'; ArviZ's R-hat here is meaningless and its ESS "
                        "and MCSE describe the resample, not the importance-sampling error: quote the Monte "
                        "Carlo errors of `infer summarize`")})
        stats = xr.Dataset({"lp": (("chain", "draw"), k.log_post[idx][None, :]),
                            "ln_likelihood": (("chain", "draw"), k.log_like[idx][None, :])}, coords=coords)
        idata = az.InferenceData(posterior=posterior, sample_stats=stats)
        idata.add_groups({"exact_weighted": ex})
    else:
        steps, ens, walk = k.position.shape[:3]

        def chains(a):                       # (T, E, W) -> (E·W, T): chain = one walker
            return np.ascontiguousarray(np.asarray(a, float).transpose(1, 2, 0).reshape(ens * walk, steps))

        step0 = run.burn.burn
        coords = {"chain": np.arange(ens * walk), "draw": np.arange(steps),
                  "ensemble": ("chain", np.repeat(np.arange(ens), walk)),
                  "walker": ("chain", np.tile(np.arange(walk), ens)),
                  "step": ("draw", step0 + 1 + run.thin * np.arange(steps))}
        post = {nm: (("chain", "draw"), chains(k.column(nm)), {"tex": tex[nm]}) for nm in k.all_names}
        posterior = xr.Dataset(post, coords=coords, attrs={
            "meaning": ("chain = one walker (ensemble = chain // walkers); draw = one kept step. ArviZ's ESS "
                        "here equals infer's; ArviZ's R-hat across walkers is not infer's, which compares "
                        "the independent ensembles"),
            "ensembles": ens, "walkers": walk, "burn_in": int(step0), "thin": int(run.thin),
            "burn_in_rule": run.burn.rule()})
        stats = xr.Dataset({"lp": (("chain", "draw"), chains(k.log_post)),
                            "ln_likelihood": (("chain", "draw"), chains(k.log_like))}, coords=coords)
        idata = az.InferenceData(posterior=posterior, sample_stats=stats)
    idata.attrs = root
    return idata


# -- the command ----------------------------------------------------------------------------------------


def export_file(chain, out, burn: int | None = None, thin: int = 1, replace: bool = False, seed: int = 0) -> str:
    """``infer export CHAIN OUT``: write ``chain``'s kept draws to ``out`` (kind from its suffix); returns
    the report line. The output is checked before the chain is read."""
    out, kind = check_output(out, replace, chain)
    run = load_run(chain, burn, thin)
    if kind == "netcdf":
        idata = inference_data(run, seed)
        write_atomic(out, lambda tmp: idata.to_netcdf(tmp, engine="h5netcdf"))
    else:
        def fill(tmp):
            with open(tmp, "w", encoding="utf-8") as fh:
                write_table(run, fh, "," if kind == "csv" else " ")
        write_atomic(out, fill)
    rows = run.kept.n if run.weighted else run.kept.log_post.size
    what = "ArviZ InferenceData (NetCDF)" if kind == "netcdf" else f"{kind} table"
    return f"exported {rows:,} draws of {chain} ({layout(run)}) to {out} as {what}"
