"""Run files: TOML (read with the standard library's `tomllib`) into validated plain dataclasses.

A run file is data, never code: values are read, type-checked and range-checked here, and every error
is one line naming the file and the dotted key. Relative paths inside a run file are resolved against
the run file's own folder, so a run behaves the same from any working directory.

Sections and keys (the README's config reference is generated from the same tables):
``[run]``, ``[dataset]``, ``[theory]``, ``[parameters.NAME]``, ``[sampling]``, ``[stopping]``,
``[output]``. Every key's type and range is checked here with `infer.validate` (the ranges are the
``LIMITS`` table below: wide enough for any real run, narrow enough that no value overflows a later
computation or sizes an absurd allocation); the ``[parameters.NAME]`` tables are read by
`infer.parameters`. Keys of ``[theory]`` other than ``code`` belong to the backend, which checks them when it is built.
"""
from __future__ import annotations

import os
import re
try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib
from dataclasses import dataclass, field
from pathlib import Path

from infer import validate
from infer.errors import UserError
from infer.theory.base import KINDS
from infer.parameters import (MIN_PRIOR_MASS, PARAM_KEYS, Parameter, Prior, _parameter,  # noqa: F401
                              log_normalisation, support, truncnormal_log_mass)

#: Sections read by their own modules: name → "module:function", called as
#: ``function(path, table, base, theory, parameters)`` with ``table`` the section ({} if absent), ``base`` the
#: run file's folder (for relative paths), ``theory`` the checked [theory] table and ``parameters`` the
#: parsed [parameters.NAME] tables; it returns the validated value kept in ``Config.sections[name]``.
SECTION_READERS: dict[str, str] = {"likelihood": "infer.model.lowell:read_section",
                                   "nuisance": "infer.model.nuisance:read_section",
                                   "derived": "infer.model.priors:read_derived_section"}
SECTIONS = {"run", "dataset", "theory", "parameters", "sampling", "stopping", "surrogate", "output"} | set(SECTION_READERS)
RUN_KEYS = {"name", "seed"}
SAMPLING_KEYS = {"engine", "walkers", "ensembles", "steps", "moves", "workers", "threads_per_worker",
                 "checkpoint_steps", "checkpoint_minutes", "log_minutes"}
SURROGATE_KEYS = {"design_points", "design_radius", "round_size", "defensive_weight", "t_dof", "t_scale",
                  "khat_max", "min_ess_per_call", "max_exact", "max_refits", "batch", "evidence_draws",
                  "method", "fit_starts"}
#: How a run samples: "ensemble" (independent emcee ensembles on the exact posterior) or "surrogate"
#: (the surrogate engine of `infer.sampling.engine`: exact posterior by importance correction).
ENGINES = ("ensemble", "surrogate")
SURROGATE_METHODS = ("auto", "poly1", "poly2", "poly3", "poly4", "gp-se-1", "gp-se-2", "gp-m52-1", "gp-m52-2")
STOPPING_KEYS = {"rhat_below", "ess_above", "tau_multiple", "check_every", "time_limit", "min_steps"}
OUTPUT_KEYS = {"chain", "summary"}
MOVES = ("de-snooker", "stretch", "de")

#: Keys whose change alters the posterior or the algorithm; refused on resume (see `posterior_diff`).
FROZEN_PREFIXES = ("dataset.", "theory.", "parameters.", "sampling.walkers", "sampling.ensembles",
                   "sampling.moves", "sampling.engine", "surrogate.") + tuple(f"{s}." for s in SECTION_READERS)
#: [surrogate] keys a resume may change (they bound the run, never change a value computed so far).
RUN_CONTROL_SURROGATE_KEYS = ("surrogate.max_exact",)
#: Theory keys that change speed only, never a prediction (the template model's simulated cost).
RUN_CONTROL_THEORY_KEYS = ("theory.delay_seconds",)
#: Keys under [parameters] that only change the starting ball or labels, never the posterior.
COSMETIC_PARAM_KEYS = ("guess", "spread", "tex")

#: Largest seed (stored as a signed 64-bit integer in the chain file).
MAX_SEED = 2**63 - 1
#: Longest duration anywhere in a run file or on the command line: one year, in seconds.
MAX_SECONDS = 366 * 86400.0
MAX_MINUTES = MAX_SECONDS / 60.0
#: Ranges of the numeric run-control keys: (integer, low, high); low is exclusive for reals marked so.
LIMITS = {
    "sampling.walkers": (True, 2, 100_000),
    "sampling.ensembles": (True, 1, 1024),
    "sampling.steps": (True, 1, 10**9),
    "sampling.workers": (True, 0, 4096),
    "sampling.threads_per_worker": (True, 0, 1024),
    "sampling.checkpoint_steps": (True, 1, 10**9),
    "sampling.checkpoint_minutes": (False, 0.0, MAX_MINUTES),      # > 0
    "sampling.log_minutes": (False, 0.0, MAX_MINUTES),             # > 0
    "stopping.rhat_below": (False, 1.0, 100.0),                    # > 1
    "stopping.ess_above": (False, 0.0, 1e12),
    "stopping.tau_multiple": (False, 0.0, 1e6),
    "stopping.check_every": (True, 1, 10**9),
    "stopping.min_steps": (True, 1, 10**9),
    "surrogate.design_points": (True, 0, 100_000),
    "surrogate.design_radius": (False, 0.0, 20.0),               # > 0
    "surrogate.round_size": (True, 8, 1_000_000),
    "surrogate.defensive_weight": (False, 0.0, 0.9),             # > 0
    "surrogate.t_dof": (False, 0.0, 1000.0),                     # > 0
    "surrogate.t_scale": (False, 0.0, 100.0),                    # > 0
    "surrogate.khat_max": (False, 0.0, 1.0),                     # > 0
    "surrogate.min_ess_per_call": (False, 0.0, 1.0),
    "surrogate.max_exact": (True, 1, 10**9),
    "surrogate.max_refits": (True, 0, 1000),
    "surrogate.batch": (True, 1, 100_000),
    "surrogate.evidence_draws": (True, 1000, 10**8),
    "surrogate.fit_starts": (True, 1, 100),
}
_OPEN_LOW = {"sampling.checkpoint_minutes", "sampling.log_minutes", "stopping.rhat_below", "surrogate.design_radius",
             "surrogate.defensive_weight", "surrogate.t_dof", "surrogate.t_scale", "surrogate.khat_max"}


@dataclass(frozen=True)
class Sampling:
    engine: str = "ensemble"
    walkers: int = 32
    ensembles: int = 2
    steps: int = 5000
    moves: str = "de-snooker"
    workers: int = 1
    threads_per_worker: int = 0           # 0: one thread (see evaluate.threads_for)
    checkpoint_steps: int = 50
    checkpoint_minutes: float = 10.0
    log_minutes: float = 1.0


@dataclass(frozen=True)
class Stopping:
    rhat_below: float = 1.01
    ess_above: float = 1000.0
    tau_multiple: float = 50.0
    check_every: int = 50
    min_steps: int = 100
    time_limit: float | None = None       # seconds


@dataclass(frozen=True)
class Surrogate:
    """``[surrogate]``: settings of the surrogate engine (meaning and defaults in `infer.sampling.engine`)."""
    design_points: int = 0             # 0: automatic, (P+1)(P+2) + 4P
    design_radius: float = 4.0         # σ of the Laplace approximation
    round_size: int = 256              # exact calls per correction round (fewer once the target is near)
    defensive_weight: float = 0.1      # α, share of the heavy-tailed proposal component
    t_dof: float = 5.0                 # ν of that component
    t_scale: float = 1.5               # its width in Laplace σ
    khat_max: float = 0.7              # Pareto k̂ above this: weights unusable (Vehtari et al. 2024)
    min_ess_per_call: float = 0.5      # a round below this refines the surrogate
    max_exact: int = 20000             # exact calls at most
    max_refits: int = 8                # surrogate refinements at most
    batch: int = 32                    # exact calls per committed batch (a kill loses at most one)
    evidence_draws: int = 40000        # cheap surrogate calls to normalise the surrogate posterior
    method: str = "auto"               # surrogate regression (chosen by held-out Δχ² when "auto")
    fit_starts: int = 1                # starts of the best fit

    def design_size(self, P: int) -> int:
        return self.design_points or (P + 1) * (P + 2) + 4 * P


@dataclass(frozen=True)
class Config:
    path: str                             # the run file, resolved
    text: str                             # its full text (stored in the chain file)
    raw: dict                             # the parsed TOML, for diffs
    name: str
    seed: int
    dataset: dict                         # file/covariance resolved to absolute paths
    theory: dict
    parameters: tuple[Parameter, ...]
    sampling: Sampling
    stopping: Stopping
    chain_path: str
    summary_dir: str
    surrogate: Surrogate = Surrogate()
    sections: dict = field(default_factory=dict)   # validated values of the SECTION_READERS sections

    @property
    def sampled(self) -> tuple[Parameter, ...]:
        return tuple(p for p in self.parameters if p.value is None and not p.analytic)

    @property
    def analytic(self) -> tuple[Parameter, ...]:
        """Parameters integrated out in closed form (``analytic = true``): neither sampled nor fixed."""
        return tuple(p for p in self.parameters if p.analytic)

    @property
    def fixed(self) -> dict[str, float]:
        return {p.name: p.value for p in self.parameters if p.value is not None}


def parse_duration(text, where="--time-limit") -> float:
    """'47:30:00', '2-00:00:00' (days-h:m:s), '90m', '3600' or '1.5h' → seconds in (0, MAX_SECONDS]
    (`infer.validate.duration`)."""
    return validate.duration(where, text, high=MAX_SECONDS)


def _resolve(base: Path, value, path, key) -> str:
    if not isinstance(value, str) or not value.strip():
        raise UserError(f"{path}: '{key}' must be a non-empty path string, got {validate.show(value)}")
    if "\0" in value:
        raise UserError(f"{path}: '{key}' holds a NUL character")
    p = Path(os.path.expandvars(os.path.expanduser(value)))
    try:
        return str((base / p).resolve() if not p.is_absolute() else p.resolve())
    except RuntimeError:                    # Python < 3.13: a symlink loop
        raise UserError(f"{path}: '{key}' = {value!r} is a loop of symbolic links") from None
    except (OSError, ValueError) as exc:
        raise UserError(f"{path}: '{key}' = {value!r} cannot be resolved "
                        f"({getattr(exc, 'strerror', None) or exc})") from None


def _limited(path, key, value):
    """A run-control number checked against `LIMITS` (ints stay int, reals become float)."""
    integer, low, high = LIMITS[key]
    out = validate.number(path, key, value, integer=integer, low=low, high=high,
                          low_open=key in _OPEN_LOW)
    return out if integer else float(out)


def _dataclass_from(path, section, table, cls, rules):
    values = {}
    for key, val in table.items():
        values[key] = rules[key](path, f"{section}.{key}", val)
    return cls(**values)


def _dataset(path, ds, base) -> dict:
    from infer.data import selection
    return selection.read(path, ds, base, _resolve)


def parse(text: str, path: str) -> Config:
    """Parse and validate run-file text; ``path`` is used for messages and relative paths."""
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise UserError(f"{path}: not valid TOML ({' '.join(str(err).split())})") from None
    for section in raw:
        if section not in SECTIONS:
            raise UserError(f"{path}: unknown section [{section}] (allowed: {', '.join(sorted(SECTIONS))})")
    base = Path(path).resolve().parent

    run = raw.get("run", {})
    validate.check_keys(path, "run", run, RUN_KEYS)
    name = run.get("name", Path(path).stem)
    if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_.-]{0,199}", name):
        raise UserError(f"{path}: 'run.name' must be 1–200 letters, digits, '.', '_' or '-', "
                        f"got {validate.show(name)}")
    seed = validate.number(path, "run.seed", run.get("seed", 1), integer=True, low=0, high=MAX_SEED)

    ds = raw.get("dataset")
    if ds is None:
        raise UserError(f"{path}: missing section [dataset]")
    dataset = _dataset(path, ds, base)

    theory = raw.get("theory")
    if theory is None or not isinstance(theory, dict) or "code" not in theory:
        raise UserError(f"{path}: missing section [theory] with key 'code' (\"camb\" or \"templates\")")
    validate.text(path, "theory.code", theory["code"])
    from infer.theory import check_settings as check_theory_settings    # types and ranges, no theory import
    check_theory_settings(theory, f"{path}: [theory]")

    params_raw = raw.get("parameters")
    if not isinstance(params_raw, dict) or not params_raw:
        raise UserError(f"{path}: missing [parameters.NAME] tables")
    parameters = tuple(_parameter(path, n, t) for n, t in params_raw.items())
    if not any(p.value is None and not p.analytic for p in parameters):
        raise UserError(f"{path}: no sampled parameter (every [parameters.NAME] has a fixed 'value' or "
                        "analytic = true)")

    def moves(p, k, v):
        return validate.choice(p, k, v, MOVES)

    def engine(p, k, v):
        return validate.choice(p, k, v, ENGINES)

    sm = raw.get("sampling", {})
    validate.check_keys(path, "sampling", sm, SAMPLING_KEYS)
    rules = {key: _limited for key in SAMPLING_KEYS if key not in ("moves", "engine")}
    sampling = _dataclass_from(path, "sampling", sm, Sampling, {**rules, "moves": moves, "engine": engine})
    n_sampled = sum(p.value is None and not p.analytic for p in parameters)
    if sampling.walkers < 2 * n_sampled or sampling.walkers % 2:
        raise UserError(f"{path}: 'sampling.walkers' must be even and at least twice the number of sampled "
                        f"parameters ({2 * n_sampled}), got {sampling.walkers}")

    st = raw.get("stopping", {})
    validate.check_keys(path, "stopping", st, STOPPING_KEYS)
    st = dict(st)
    if "time_limit" in st:
        st["time_limit"] = parse_duration(st["time_limit"], f"{path}: 'stopping.time_limit'")
    rules = {key: _limited for key in STOPPING_KEYS if key != "time_limit"}
    stopping = _dataclass_from(path, "stopping", st, Stopping, {**rules, "time_limit": lambda p, k, v: v})

    surrogate = _surrogate(path, raw.get("surrogate", {}), sampling, n_sampled)
    sections = {name: _reader(spec)(path, raw.get(name, {}), base, dict(theory), parameters)
                for name, spec in SECTION_READERS.items()}

    out = raw.get("output", {})
    validate.check_keys(path, "output", out, OUTPUT_KEYS)
    chain_path = _resolve(base, out["chain"], path, "output.chain") if "chain" in out \
        else str((Path.cwd() / "chains" / f"{name}.h5").resolve())
    if not chain_path.endswith(".h5"):
        raise UserError(f"{path}: 'output.chain' must end in .h5, got {out['chain']!r}")
    for key in ("file", "covariance"):
        if dataset.get(key) == chain_path:
            raise UserError(f"{path}: 'output.chain' is the dataset's {'file' if key == 'file' else key} "
                            f"{chain_path}; a chain must never be written over its input")
    summary_dir = _resolve(base, out["summary"], path, "output.summary") if "summary" in out \
        else chain_path[:-3]
    for key in ("file", "covariance"):
        if dataset.get(key) == summary_dir:
            raise UserError(f"{path}: 'output.summary' is the dataset's {key} {summary_dir}")
    return Config(str(Path(path).resolve()), text, raw, name, seed, dataset, dict(theory), parameters,
                  sampling, stopping, chain_path, summary_dir, surrogate, sections)


def _reader(spec: str):
    """The function named ``"module:function"`` in `SECTION_READERS`."""
    import importlib
    module, name = spec.split(":")
    return getattr(importlib.import_module(module), name)


def _surrogate(path, table, sampling: Sampling, n_sampled: int) -> Surrogate:
    """``[surrogate]`` checked: types and ranges, and settings that cannot work for ``n_sampled``
    parameters (a design too small to fit even a linear surrogate, a batch larger than a round)."""
    validate.check_keys(path, "surrogate", table, SURROGATE_KEYS)
    if table and sampling.engine != "surrogate":
        raise UserError(f"{path}: [surrogate] is given but 'sampling.engine' is {sampling.engine!r}; "
                        "set sampling.engine = \"surrogate\" or remove [surrogate]")
    rules = {key: _limited for key in SURROGATE_KEYS if key != "method"}
    rules["method"] = lambda p, k, v: validate.choice(p, k, v, SURROGATE_METHODS)
    s = _dataclass_from(path, "surrogate", table, Surrogate, rules)
    if s.design_points and s.design_points < n_sampled + 2:
        raise UserError(f"{path}: 'surrogate.design_points' = {s.design_points} cannot fit a surrogate of "
                        f"{n_sampled} parameters: use at least {n_sampled + 2} (or 0 for the automatic "
                        f"{s.design_size(n_sampled)})")
    if s.batch > s.round_size:
        raise UserError(f"{path}: 'surrogate.batch' = {s.batch} exceeds 'surrogate.round_size' = {s.round_size}")
    if s.max_exact < s.design_size(n_sampled) + s.round_size:
        raise UserError(f"{path}: 'surrogate.max_exact' = {s.max_exact} leaves no room for one correction round "
                        f"after the design ({s.design_size(n_sampled)} points) and the fit: use at least "
                        f"{s.design_size(n_sampled) + s.round_size + 50 * n_sampled}")
    return s


def load(path) -> Config:
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{path}: no such run file") from None
    except (OSError, UnicodeDecodeError) as err:
        raise UserError(f"{path}: cannot read run file ({err.__class__.__name__}: {err})") from None
    return parse(text, str(p))


def stored(state) -> Config:
    """The run file stored in a chain's provenance (``state.provenance``), parsed again."""
    prov = state.provenance
    return parse(prov["config_text"], prov["config_path"])


def _flatten(table, prefix=""):
    out = {}
    for key, val in table.items():
        if isinstance(val, dict):
            out.update(_flatten(val, f"{prefix}{key}."))
        else:
            out[f"{prefix}{key}"] = val
    return out


def diff(old: Config, new: Config) -> tuple[list[str], list[str]]:
    """Compare two run files. Returns (refused, allowed) lists of readable lines ``key: old → new``.

    Refused: anything that changes the posterior (dataset, theory, priors, fixed values, the parameter
    set) or the algorithm (walkers, ensembles, moves). Dataset *contents* are compared separately by hash.
    Allowed: run length, stopping rule, checkpoint interval, workers, threads, output paths, labels,
    starting-ball keys.
    """
    a, b = _flatten(old.raw), _flatten(new.raw)
    # Compare resolved paths, not spellings relative to two different run-file folders.
    for flat, cfg in ((a, old), (b, new)):
        for key in ("file", "covariance"):
            if f"dataset.{key}" in flat:
                flat[f"dataset.{key}"] = cfg.dataset[key]
    refused, allowed = [], []
    for key in sorted(set(a) | set(b)):
        va, vb = a.get(key, "(absent)"), b.get(key, "(absent)")
        if va == vb:
            continue
        line = f"{key}: {va!r} → {vb!r}"
        cosmetic = (key.startswith("parameters.") and key.split(".")[2] in COSMETIC_PARAM_KEYS
                    and not (old.sampling.engine == "surrogate" and key.split(".")[2] != "tex")) or \
            key in RUN_CONTROL_THEORY_KEYS or key in RUN_CONTROL_SURROGATE_KEYS
        if key.startswith(FROZEN_PREFIXES) and not cosmetic:
            refused.append(line)
        else:
            allowed.append(line)
    return refused, allowed


#: Names other modules import from here (the parameter tables' types are re-exported from `infer.parameters`).
__all__ = ["Config", "stored", "Sampling", "Stopping", "Surrogate", "Prior", "Parameter", "parse", "load", "diff", "support",
           "parse_duration", "log_normalisation", "truncnormal_log_mass", "MIN_PRIOR_MASS", "PARAM_KEYS", "LIMITS",
           "ENGINES", "MOVES", "MAX_SEED", "MAX_SECONDS"]
