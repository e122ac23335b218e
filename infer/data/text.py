"""The plain-text route: a band-power table plus a covariance file (``.npy`` or text).

The table (``.txt``, ``.dat``, ``.csv``) is separated by whitespace or commas; its header line names
the columns ``kind ell_lo ell_hi value`` and optionally ``ell_eff`` (default: the band midpoint), in
any order; ``#`` starts a comment (the header line itself may be written as a comment). The units come
from the caller (a plain table cannot declare them). Windows are top-hats over ℓ_lo…ℓ_hi (weight 1/n)
in the declared spectrum — the simplest band-power definition (common practice).

The covariance is a NumPy ``.npy`` file, read with ``allow_pickle=False`` after its header has been
inspected (so that a file holding Python objects is named as such, and a file that is not ``.npy`` at
all is named as that), or a numeric text table. Then the checks of `infer.data.checks` apply; every
message names the file, the column or line.
"""
from __future__ import annotations

import hashlib
import io
import re
import warnings
from pathlib import Path

import numpy as np

from infer.data.bandpowers import UNITS, BandPowers
from infer.data.checks import assemble, read_bytes
from infer.errors import UserError

SUFFIXES = (".txt", ".dat", ".csv")
COVARIANCE_TEXT_SUFFIXES = (".txt", ".dat", ".csv")
REQUIRED = ("kind", "ell_lo", "ell_hi", "value")
OPTIONAL = ("ell_eff",)

_SPLIT = re.compile(r"[\s,]+")


def _tokens(line: str) -> list[str]:
    return [t for t in _SPLIT.split(line.strip()) if t]


def _table(path: Path, text: str) -> dict[str, list]:
    """Columns of the band-power table, by header name (kinds as str, the rest as float)."""
    header: list[str] | None = None
    rows: list[tuple[int, list[str]]] = []
    for lineno, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            toks = _tokens(stripped.lstrip("#"))
            if header is None and set(REQUIRED) <= set(toks):
                header = toks
            continue
        toks = _tokens(stripped.split("#", 1)[0])
        if header is None:
            header = toks
            continue
        rows.append((lineno, toks))
    if header is None:
        raise UserError(f"{path}: header line: missing; name the columns {' '.join(REQUIRED)}")
    allowed = REQUIRED + OPTIONAL
    for name in header:
        if name not in allowed:
            raise UserError(f"{path}: header line: unknown column {name!r} "
                            f"(allowed: {', '.join(allowed)})")
        if header.count(name) > 1:
            raise UserError(f"{path}: header line: column {name!r} appears twice")
    for name in REQUIRED:
        if name not in header:
            raise UserError(f"{path}: column {name}: missing from the header line")
    if not rows:
        raise UserError(f"{path}: no band rows below the header line")

    cols: dict[str, list] = {name: [] for name in header}
    for lineno, toks in rows:
        if len(toks) != len(header):
            raise UserError(f"{path}: line {lineno}: has {len(toks)} fields but the header names "
                            f"{len(header)}")
        for name, tok in zip(header, toks):
            if name == "kind":
                cols[name].append(tok)
                continue
            try:
                cols[name].append(float(tok))
            except ValueError:
                raise UserError(f"{path}: column {name}: line {lineno}: {tok!r} is not a number") \
                    from None
    return cols


def _npy(cov_path: Path, data: bytes) -> np.ndarray:
    """A numeric array from ``.npy`` bytes; the header is read first, so the message says what is
    really wrong: not a .npy file at all, Python objects inside, non-numeric values, or truncated."""
    fmt = np.lib.format
    buf = io.BytesIO(data)
    try:
        major, _ = fmt.read_magic(buf)
        header = fmt.read_array_header_1_0 if major == 1 else fmt.read_array_header_2_0
        shape, _, dtype = header(buf)
    except (ValueError, EOFError, OSError, SyntaxError, TypeError):
        raise UserError(f"{cov_path}: covariance: not a NumPy .npy file (no valid .npy header; "
                        f"save the matrix with numpy.save, or give a text table)") from None
    if dtype.hasobject:
        raise UserError(f"{cov_path}: covariance: the .npy file holds Python objects, which are never "
                        f"unpickled; save a plain float array")
    if dtype.kind not in "iuf":
        raise UserError(f"{cov_path}: covariance: the .npy file holds {dtype} values, not numbers")
    try:
        arr = np.load(io.BytesIO(data), allow_pickle=False)
    except (ValueError, EOFError, OSError):
        raise UserError(f"{cov_path}: covariance: the .npy file is truncated or damaged (its header "
                        f"promises shape {shape} of {dtype})") from None
    return np.asarray(arr, dtype=float)


def _text_matrix(cov_path: Path, data: bytes) -> np.ndarray:
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise UserError(f"{cov_path}: covariance: not UTF-8 text (binary file with a text "
                        f"suffix?)") from None
    body = [ln.split("#", 1)[0].strip() for ln in text.splitlines()]
    if not any(body):
        raise UserError(f"{cov_path}: covariance: the file holds no numbers")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            return np.loadtxt(io.StringIO(text.replace(",", " ")), comments="#", ndmin=2,
                              dtype=float)
    except (ValueError, UserWarning) as exc:
        first = str(exc).splitlines()[0] if str(exc) else "unreadable"
        first = first.split("; use `usecols`")[0]
        raise UserError(f"{cov_path}: covariance: not a numeric table ({first})") from None


def parse_covariance(cov_path: Path, data: bytes) -> np.ndarray:
    """The covariance matrix in a ``.npy`` or text file's bytes (shape checked by the caller)."""
    suffix = cov_path.suffix.lower()
    if suffix == ".npy":
        return _npy(cov_path, data)
    if suffix in COVARIANCE_TEXT_SUFFIXES:
        return _text_matrix(cov_path, data)
    raise UserError(f"{cov_path}: covariance: unknown suffix {cov_path.suffix!r} "
                    f"(use .npy, .txt, .dat or .csv)")


def read(path: Path, covariance, units, theory_ell_max=None) -> BandPowers:
    """Read and check a plain table with its covariance file in the declared ``units``."""
    path = Path(path)
    if covariance is None:
        raise UserError(f"{path}: a plain-text dataset needs a covariance file (.npy or text)")
    if units is None:
        raise UserError(f"{path}: a plain-text dataset needs its units declared "
                        f"(one of {', '.join(UNITS)})")
    cov_path = Path(covariance)
    data = read_bytes(path, "band-power table")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        raise UserError(f"{path}: band-power table is not UTF-8 text") from None
    cols = _table(path, text)

    cov_data = read_bytes(cov_path, "covariance file")
    cov = parse_covariance(cov_path, cov_data)
    hasher = hashlib.sha256(data)
    hasher.update(cov_data)

    raw = {"kind": np.array(cols["kind"]),
           "ell_lo": np.array(cols["ell_lo"]), "ell_hi": np.array(cols["ell_hi"]),
           "ell_eff": np.array(cols["ell_eff"]) if "ell_eff" in cols else None,
           "value": np.array(cols["value"]), "covariance": cov,
           "window_ell": None, "window": None}
    labels = {key: f"{path}: column {key}" for key in ("kind", "ell_lo", "ell_hi", "ell_eff", "value")}
    labels["covariance"] = f"{cov_path}: covariance"
    labels["window_ell"] = labels["window"] = f"{path}: windows (top-hat from ell_lo/ell_hi)"
    labels["units"] = f"{path}: units"
    return assemble(raw, units=units, experiment="", source=f"{path} + {cov_path}",
                    sha256=hasher.hexdigest(), labels=labels, theory_ell_max=theory_ell_max)


__all__ = ["read", "parse_covariance", "SUFFIXES", "COVARIANCE_TEXT_SUFFIXES", "REQUIRED", "OPTIONAL"]
