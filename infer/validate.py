"""Checks of values read from user files: the one home of key and number validation.

Every reader of a user table (run file, experiment spec, theory settings, dataset attributes) checks
keys and values with these helpers, so that every message has one shape: ``WHERE: 'KEY' must be …, got
VALUE`` — one line naming the file and the key (the README's promise for bad input). Booleans are never
numbers here (TOML ``true`` is not 1), and floats must be finite unless said otherwise.
"""
from __future__ import annotations

import math
import re

from infer.errors import UserError


def show(value, limit: int = 60) -> str:
    """``repr(value)`` on one line, at most ``limit`` characters (long or multi-line values are cut)."""
    text = " ".join(repr(value).split())
    return text if len(text) <= limit else text[: limit - 1] + "…"


def is_number(x) -> bool:
    """A real number (int or float, not bool)."""
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def is_integer(x) -> bool:
    return isinstance(x, int) and not isinstance(x, bool)


def check_keys(where: str, section: str, table, allowed) -> dict:
    """``table`` is a dict whose keys are all in ``allowed``; ``section`` names it in messages."""
    if not isinstance(table, dict):
        raise UserError(f"{where}: [{section}] must be a table")
    for key in table:
        if key not in allowed:
            raise UserError(f"{where}: unknown key '{section}.{key}' (allowed: {', '.join(sorted(allowed))})")
    return table


def number(where: str, key: str, value, *, integer: bool = False, low=None, high=None,
           low_open: bool = False, high_open: bool = False, finite: bool = True):
    """``value`` as a checked number: an integer (``integer``) or a real, within [low, high]
    (open ends with ``low_open``/``high_open``). Returns it unchanged (int stays int)."""
    ok = is_integer(value) if integer else is_number(value)
    if not ok or (not integer and finite and not math.isfinite(value)):
        kind = "an integer" if integer else ("a finite number" if finite else "a number")
        raise UserError(f"{where}: '{key}' must be {kind}, got {show(value)}")
    if low is not None and (value <= low if low_open else value < low):
        raise UserError(f"{where}: '{key}' must be {'>' if low_open else '>='} {low}, got {show(value)}")
    if high is not None and (value >= high if high_open else value > high):
        raise UserError(f"{where}: '{key}' must be {'<' if high_open else '<='} {high}, got {show(value)}")
    return value


def choice(where: str, key: str, value, options) -> str:
    """``value`` is one of ``options`` (strings)."""
    if not isinstance(value, str) or value not in options:
        raise UserError(f"{where}: '{key}' must be one of {', '.join(map(str, options))}, got {show(value)}")
    return value


def boolean(where: str, key: str, value) -> bool:
    if not isinstance(value, bool):
        raise UserError(f"{where}: '{key}' must be true or false, got {show(value)}")
    return value


def text(where: str, key: str, value, *, empty: bool = False, line: bool = False) -> str:
    """A string (non-empty unless ``empty``); never a NUL character (HDF5 strings cannot hold one);
    with ``line``, one line without control characters."""
    if not isinstance(value, str) or (not empty and not value.strip()):
        raise UserError(f"{where}: '{key}' must be a {'' if empty else 'non-empty '}string, got {show(value)}")
    if line and any(ord(c) < 32 or ord(c) == 127 for c in value):
        raise UserError(f"{where}: '{key}' must be one line without control characters, got {show(value)}")
    if "\0" in value:
        raise UserError(f"{where}: '{key}' must not hold a NUL character, got {show(value)}")
    return value


def subset(where: str, key: str, value, options, *, empty: bool = False) -> tuple:
    """``value`` is a list of distinct strings drawn from ``options`` (non-empty unless ``empty``);
    returned as a tuple in the given order."""
    shown = ", ".join(map(str, options))
    if not isinstance(value, (list, tuple)) or (not value and not empty):
        raise UserError(f"{where}: '{key}' must be a {'' if empty else 'non-empty '}list drawn from "
                        f"{shown}, got {show(value)}")
    for item in value:
        if not isinstance(item, str) or item not in options:
            raise UserError(f"{where}: '{key}' must be a list drawn from {shown}, got {show(item)} "
                            f"in it")
    twice = [item for i, item in enumerate(value) if item in value[:i]]
    if twice:
        raise UserError(f"{where}: '{key}' lists {twice[0]!r} twice")
    return tuple(value)


_DURATION = re.compile(r"^(?:(\d+)-)?(\d+):(\d{1,2}):(\d{1,2})$|^(\d+(?:\.\d+)?)\s*([smhd]?)$")


def duration(where: str, text, *, high: float) -> float:
    """A wall-time string (or number of seconds) → seconds in (0, high]: 'H:MM:SS', 'D-H:MM:SS' (as
    batch schedulers write them), or a number with an optional unit s/m/h/d ('90m', '1.5h', '3600').
    In the clock forms minutes and seconds run 0–59, and hours 0–23 after a day count."""
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        text = str(text)
    m = _DURATION.match(text.strip()) if isinstance(text, str) else None
    if not m:
        raise UserError(f"{where}: cannot read duration {show(text)} (use H:MM:SS, D-H:MM:SS, "
                        f"or 90m / 2h / 3600)")
    if m.group(5) is not None:
        scale = {"": 1, "s": 1, "m": 60, "h": 3600, "d": 86400}[m.group(6)]
        seconds = float(m.group(5)) * scale
    else:
        days, hours, minutes, secs = (int(m.group(i) or 0) for i in (1, 2, 3, 4))
        for value, field in ((minutes, "minutes"), (secs, "seconds")):
            if value >= 60:
                raise UserError(f"{where}: duration {text!r} has {value} {field}; {field} run 0–59")
        if m.group(1) is not None and hours >= 24:
            raise UserError(f"{where}: duration {text!r} has {hours} hours after a day count; hours "
                            "run 0–23 in D-H:MM:SS")
        seconds = float(days * 86400 + hours * 3600 + minutes * 60 + secs)
    if not seconds > 0:
        raise UserError(f"{where}: duration must be positive, got {text!r}")
    if not seconds <= high:
        raise UserError(f"{where}: duration {show(text)} is longer than {high:.0f} s "
                        f"({high / 86400:.0f} days), the most accepted")
    return seconds
