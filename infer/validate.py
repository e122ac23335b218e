"""Checks of values read from user files: the one home of key and number validation.

Every reader of a user table (run file, experiment spec, theory settings, dataset attributes) checks
keys and values with these helpers, so that every message has one shape: ``WHERE: 'KEY' must be …, got
VALUE`` — one line naming the file and the key (the README's promise for bad input). Booleans are never
numbers here (TOML ``true`` is not 1), and floats must be finite unless said otherwise.
"""
from __future__ import annotations

import math

from infer.errors import UserError


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
        raise UserError(f"{where}: '{key}' must be {kind}, got {value!r}")
    if low is not None and (value <= low if low_open else value < low):
        raise UserError(f"{where}: '{key}' must be {'>' if low_open else '>='} {low}, got {value!r}")
    if high is not None and (value >= high if high_open else value > high):
        raise UserError(f"{where}: '{key}' must be {'<' if high_open else '<='} {high}, got {value!r}")
    return value


def choice(where: str, key: str, value, options) -> str:
    """``value`` is one of ``options`` (strings)."""
    if not isinstance(value, str) or value not in options:
        raise UserError(f"{where}: '{key}' must be one of {', '.join(map(str, options))}, got {value!r}")
    return value


def boolean(where: str, key: str, value) -> bool:
    if not isinstance(value, bool):
        raise UserError(f"{where}: '{key}' must be true or false, got {value!r}")
    return value


def text(where: str, key: str, value, *, empty: bool = False) -> str:
    if not isinstance(value, str) or (not empty and not value.strip()):
        raise UserError(f"{where}: '{key}' must be a {'' if empty else 'non-empty '}string, got {value!r}")
    return value
