"""Run files: TOML (read with the standard library's `tomllib`) into validated plain dataclasses.

A run file is data, never code: values are read, type-checked and range-checked here, and every error
is one line naming the file and the dotted key. Relative paths inside a run file are resolved against
the run file's own folder, so a run behaves the same from any working directory.

Sections and keys (the README's config reference is generated from the same tables):
``[run]``, ``[dataset]``, ``[theory]``, ``[parameters.NAME]``, ``[sampling]``, ``[stopping]``,
``[output]``.
"""
from __future__ import annotations

import math
import os
import re
try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib
from dataclasses import dataclass
from pathlib import Path

from infer.errors import UserError

SECTIONS = {"run", "dataset", "theory", "parameters", "sampling", "stopping", "output"}
RUN_KEYS = {"name", "seed"}
DATASET_KEYS = {"file", "covariance", "units", "spectra", "ell_min", "ell_max"}
PARAM_KEYS = {"prior", "value", "guess", "spread", "tex"}
SAMPLING_KEYS = {"walkers", "ensembles", "steps", "moves", "workers", "threads_per_worker",
                 "checkpoint_steps", "checkpoint_minutes", "log_minutes"}
STOPPING_KEYS = {"rhat_below", "ess_above", "tau_multiple", "check_every", "time_limit", "min_steps"}
OUTPUT_KEYS = {"chain", "summary"}
MOVES = ("de-snooker", "stretch", "de")

#: Keys whose change alters the posterior or the algorithm; refused on resume (see `posterior_diff`).
FROZEN_PREFIXES = ("dataset.", "theory.", "parameters.", "sampling.walkers", "sampling.ensembles",
                   "sampling.moves")
#: Theory keys that change speed only, never a prediction (the template model's simulated cost).
RUN_CONTROL_THEORY_KEYS = ("theory.delay_seconds",)
#: Keys under [parameters] that only change the starting ball or labels, never the posterior.
COSMETIC_PARAM_KEYS = ("guess", "spread", "tex")


@dataclass(frozen=True)
class Prior:
    """``kind`` is 'uniform', 'normal' or 'truncnormal'; ``args`` as documented in `infer.priors`."""
    kind: str
    args: tuple[float, ...]


@dataclass(frozen=True)
class Parameter:
    name: str
    prior: Prior | None          # None for a fixed parameter
    value: float | None          # fixed value, or None when sampled
    guess: float | None
    spread: float | None
    tex: str


@dataclass(frozen=True)
class Sampling:
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

    @property
    def sampled(self) -> tuple[Parameter, ...]:
        return tuple(p for p in self.parameters if p.value is None)

    @property
    def fixed(self) -> dict[str, float]:
        return {p.name: p.value for p in self.parameters if p.value is not None}


def _check_keys(path, section, table, allowed):
    if not isinstance(table, dict):
        raise UserError(f"{path}: [{section}] must be a table")
    for key in table:
        if key not in allowed:
            raise UserError(f"{path}: unknown key '{section}.{key}' (allowed: {', '.join(sorted(allowed))})")


def _number(path, key, value, *, integer=False, low=None, high=None, low_open=False):
    ok = isinstance(value, int) if integer else isinstance(value, (int, float))
    if isinstance(value, bool) or not ok or (not integer and not math.isfinite(value)):
        kind = "an integer" if integer else "a finite number"
        raise UserError(f"{path}: '{key}' must be {kind}, got {value!r}")
    if low is not None and (value <= low if low_open else value < low):
        raise UserError(f"{path}: '{key}' must be {'>' if low_open else '>='} {low}, got {value!r}")
    if high is not None and value > high:
        raise UserError(f"{path}: '{key}' must be <= {high}, got {value!r}")
    return value


_DURATION = re.compile(r"^(?:(\d+)-)?(\d+):(\d{1,2}):(\d{1,2})$|^(\d+(?:\.\d+)?)\s*([smhd]?)$")


def parse_duration(text, where="--time-limit") -> float:
    """'47:30:00', '2-00:00:00' (days-h:m:s), '90m', '3600' or '1.5h' → seconds."""
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        text = str(text)
    m = _DURATION.match(str(text).strip()) if isinstance(text, str) else None
    if not m:
        raise UserError(f"{where}: cannot read duration {text!r} (use H:MM:SS, D-H:MM:SS, or 90m / 2h / 3600)")
    if m.group(5) is not None:
        scale = {"": 1, "s": 1, "m": 60, "h": 3600, "d": 86400}[m.group(6)]
        seconds = float(m.group(5)) * scale
    else:
        days = int(m.group(1) or 0)
        seconds = days * 86400 + int(m.group(2)) * 3600 + int(m.group(3)) * 60 + int(m.group(4))
    if seconds <= 0:
        raise UserError(f"{where}: duration must be positive, got {text!r}")
    return seconds


def _prior(path, name, spec) -> Prior:
    key = f"parameters.{name}.prior"
    if not isinstance(spec, dict) or not spec:
        raise UserError(f"{path}: '{key}' must be a table such as {{ uniform = [0.0, 1.0] }} "
                        "or {{ normal = [mean, sd] }} (optionally with range = [lo, hi])")
    kinds = [k for k in spec if k in ("uniform", "normal")]
    extra = [k for k in spec if k not in ("uniform", "normal", "range")]
    if len(kinds) != 1 or extra:
        raise UserError(f"{path}: '{key}' needs exactly one of 'uniform' or 'normal' (and optionally 'range'), "
                        f"got keys {sorted(spec)}")
    kind = kinds[0]
    args = spec[kind]
    if not (isinstance(args, list) and len(args) == 2):
        raise UserError(f"{path}: '{key}.{kind}' must be a list of two numbers, got {args!r}")
    a, b = (_number(path, f"{key}.{kind}", v) for v in args)
    if kind == "uniform":
        if "range" in spec:
            raise UserError(f"{path}: '{key}': 'range' goes with 'normal' only")
        if not a < b:
            raise UserError(f"{path}: '{key}.uniform' needs lower < upper, got [{a}, {b}]")
        return Prior("uniform", (float(a), float(b)))
    if not b > 0:
        raise UserError(f"{path}: '{key}.normal' needs a positive standard deviation, got {b}")
    if "range" in spec:
        rng = spec["range"]
        if not (isinstance(rng, list) and len(rng) == 2):
            raise UserError(f"{path}: '{key}.range' must be [lower, upper], got {rng!r}")
        lo, hi = (_number(path, f"{key}.range", v) for v in rng)
        if not lo < hi:
            raise UserError(f"{path}: '{key}.range' needs lower < upper, got [{lo}, {hi}]")
        return Prior("truncnormal", (float(a), float(b), float(lo), float(hi)))
    return Prior("normal", (float(a), float(b)))


def _parameter(path, name, table) -> Parameter:
    if not re.fullmatch(r"[A-Za-z][A-Za-z0-9_]*", name):
        raise UserError(f"{path}: parameter name '{name}' must be letters, digits and underscores")
    _check_keys(path, f"parameters.{name}", table, PARAM_KEYS)
    tex = table.get("tex", name)
    if not isinstance(tex, str):
        raise UserError(f"{path}: 'parameters.{name}.tex' must be a string")
    if "value" in table:
        if "prior" in table:
            raise UserError(f"{path}: 'parameters.{name}' has both 'value' (fixed) and 'prior' (sampled)")
        return Parameter(name, None, float(_number(path, f"parameters.{name}.value", table["value"])),
                         None, None, tex)
    if "prior" not in table:
        raise UserError(f"{path}: 'parameters.{name}' needs a 'prior' (sampled) or a 'value' (fixed)")
    prior = _prior(path, name, table["prior"])
    lo, hi = support(prior)
    if prior.kind == "uniform":
        default_guess, default_spread = 0.5 * (lo + hi), 0.01 * (hi - lo)
    else:
        default_guess, default_spread = prior.args[0], 0.1 * prior.args[1]
    guess = float(_number(path, f"parameters.{name}.guess", table.get("guess", default_guess)))
    spread = float(_number(path, f"parameters.{name}.spread", table.get("spread", default_spread),
                           low=0, low_open=True))
    if not lo < guess < hi:
        raise UserError(f"{path}: 'parameters.{name}.guess' = {guess} lies outside the prior support [{lo}, {hi}]")
    return Parameter(name, prior, None, guess, spread, tex)


def support(prior: Prior) -> tuple[float, float]:
    if prior.kind == "uniform":
        return prior.args
    if prior.kind == "truncnormal":
        return prior.args[2], prior.args[3]
    return -math.inf, math.inf


def _resolve(base: Path, value, path, key) -> str:
    if not isinstance(value, str) or not value:
        raise UserError(f"{path}: '{key}' must be a non-empty path string")
    p = Path(os.path.expandvars(os.path.expanduser(value)))
    return str((base / p).resolve() if not p.is_absolute() else p.resolve())


def _dataclass_from(path, section, table, cls, rules):
    values = {}
    for key, val in table.items():
        values[key] = rules[key](path, f"{section}.{key}", val)
    return cls(**values)


def parse(text: str, path: str) -> Config:
    """Parse and validate run-file text; ``path`` is used for messages and relative paths."""
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise UserError(f"{path}: not valid TOML ({err})") from None
    for section in raw:
        if section not in SECTIONS:
            raise UserError(f"{path}: unknown section [{section}] (allowed: {', '.join(sorted(SECTIONS))})")
    base = Path(path).resolve().parent

    run = raw.get("run", {})
    _check_keys(path, "run", run, RUN_KEYS)
    name = run.get("name", Path(path).stem)
    if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_.-]*", name):
        raise UserError(f"{path}: 'run.name' must be letters, digits, '.', '_' or '-', got {name!r}")
    seed = _number(path, "run.seed", run.get("seed", 1), integer=True, low=0)

    ds = raw.get("dataset")
    if ds is None:
        raise UserError(f"{path}: missing section [dataset]")
    _check_keys(path, "dataset", ds, DATASET_KEYS)
    if "file" not in ds:
        raise UserError(f"{path}: missing key 'dataset.file'")
    dataset = dict(ds)
    dataset["file"] = _resolve(base, ds["file"], path, "dataset.file")
    if "covariance" in ds:
        dataset["covariance"] = _resolve(base, ds["covariance"], path, "dataset.covariance")
    if "spectra" in ds:
        sp = ds["spectra"]
        if not (isinstance(sp, list) and sp and all(s in ("TT", "TE", "EE", "BB") for s in sp)):
            raise UserError(f"{path}: 'dataset.spectra' must be a list drawn from TT, TE, EE, BB, got {sp!r}")
    for key in ("ell_min", "ell_max"):
        if key in ds:
            _number(path, f"dataset.{key}", ds[key], integer=True, low=2)
    units = ("Dl_uK2", "Dl_K2", "Cl_uK2", "Cl_K2")
    if "units" in ds and ds["units"] not in units:
        raise UserError(f"{path}: 'dataset.units' must be one of {', '.join(units)}, got {ds['units']!r}")

    theory = raw.get("theory")
    if theory is None or not isinstance(theory, dict) or "code" not in theory:
        raise UserError(f"{path}: missing section [theory] with key 'code' (\"camb\" or \"templates\")")

    params_raw = raw.get("parameters")
    if not isinstance(params_raw, dict) or not params_raw:
        raise UserError(f"{path}: missing [parameters.NAME] tables")
    parameters = tuple(_parameter(path, n, t) for n, t in params_raw.items())
    if not any(p.value is None for p in parameters):
        raise UserError(f"{path}: no sampled parameter (every [parameters.NAME] has a fixed 'value')")

    def integer(low):
        return lambda p, k, v: _number(p, k, v, integer=True, low=low)

    def positive(p, k, v):
        return float(_number(p, k, v, low=0, low_open=True))

    def moves(p, k, v):
        if v not in MOVES:
            raise UserError(f"{p}: '{k}' must be one of {', '.join(MOVES)}, got {v!r}")
        return v

    sm = raw.get("sampling", {})
    _check_keys(path, "sampling", sm, SAMPLING_KEYS)
    sampling = _dataclass_from(path, "sampling", sm, Sampling, {
        "walkers": integer(2), "ensembles": integer(1), "steps": integer(1), "moves": moves,
        "workers": integer(0), "threads_per_worker": integer(0), "checkpoint_steps": integer(1),
        "checkpoint_minutes": positive, "log_minutes": positive})
    n_sampled = sum(p.value is None for p in parameters)
    if sampling.walkers < 2 * n_sampled or sampling.walkers % 2:
        raise UserError(f"{path}: 'sampling.walkers' must be even and at least twice the number of sampled "
                        f"parameters ({2 * n_sampled}), got {sampling.walkers}")

    st = raw.get("stopping", {})
    _check_keys(path, "stopping", st, STOPPING_KEYS)
    st = dict(st)
    if "time_limit" in st:
        st["time_limit"] = parse_duration(st["time_limit"], f"{path}: 'stopping.time_limit'")
    stopping = _dataclass_from(path, "stopping", st, Stopping, {
        "rhat_below": lambda p, k, v: float(_number(p, k, v, low=1.0, low_open=True)),
        "ess_above": lambda p, k, v: float(_number(p, k, v, low=0)),
        "tau_multiple": lambda p, k, v: float(_number(p, k, v, low=0)),
        "check_every": integer(1), "min_steps": integer(1),
        "time_limit": lambda p, k, v: v})

    out = raw.get("output", {})
    _check_keys(path, "output", out, OUTPUT_KEYS)
    chain_path = _resolve(base, out["chain"], path, "output.chain") if "chain" in out \
        else str((Path.cwd() / "chains" / f"{name}.h5").resolve())
    if not chain_path.endswith(".h5"):
        raise UserError(f"{path}: 'output.chain' must end in .h5, got {out['chain']!r}")
    summary_dir = _resolve(base, out["summary"], path, "output.summary") if "summary" in out \
        else chain_path[:-3]
    return Config(str(Path(path).resolve()), text, raw, name, seed, dataset, dict(theory), parameters,
                  sampling, stopping, chain_path, summary_dir)


def load(path) -> Config:
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{path}: no such run file") from None
    except (OSError, UnicodeDecodeError) as err:
        raise UserError(f"{path}: cannot read run file ({err.__class__.__name__}: {err})") from None
    return parse(text, str(p))


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
        cosmetic = (key.startswith("parameters.") and key.split(".")[2] in COSMETIC_PARAM_KEYS) or \
            key in RUN_CONTROL_THEORY_KEYS
        if key.startswith(FROZEN_PREFIXES) and not cosmetic:
            refused.append(line)
        else:
            allowed.append(line)
    return refused, allowed
