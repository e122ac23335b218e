"""Rounding of quoted numbers: two significant digits of the uncertainty, the value to the same place.

Numbers are quoted to two significant digits of their uncertainty and the value to the same decimal
place (JCGM 100:2008, the GUM, §7.2.6, "at most two significant digits", quoted from memory; common
practice in cosmology papers), rounding half away from zero on the decimal representation (`Decimal`,
so 3.0445 ± 0.0135 gives 3.045 ± 0.014 whatever the binary value). Magnitudes ≥ 10^4 or < 10^-3 have
their power of ten factored out. Pure functions of numbers; the tables call them.
"""
from __future__ import annotations

import math
from decimal import ROUND_HALF_UP, Decimal

import numpy as np


def _dec(x: float) -> Decimal:
    return Decimal(repr(float(x)))


def _decimal_place(err: Decimal, sig: int) -> int:
    """Exponent of the last quoted digit when ``err`` is given to ``sig`` significant digits."""
    place = err.adjusted() - (sig - 1)
    rounded = err.quantize(Decimal(1).scaleb(place), rounding=ROUND_HALF_UP)
    if rounded.adjusted() > err.adjusted():        # 0.0996 → 0.10: one digit fewer after rounding up
        place += 1
    return place


def _fmt_at(v: Decimal, place: int) -> str:
    q = v.quantize(Decimal(1).scaleb(place), rounding=ROUND_HALF_UP)
    if q == 0:
        q = abs(q)                                  # no "-0.00"
    return f"{q:f}" if place < 0 else f"{q.quantize(Decimal(1)):f}"


def _sci_exponent(*vals: float) -> int:
    """Power of ten to factor out: that of the largest magnitude when it is ≥ 10^4 or < 10^-3."""
    big = max((abs(v) for v in vals if np.isfinite(v) and v != 0), default=0.0)
    if big == 0:
        return 0
    n = int(math.floor(math.log10(big)))
    return n if (n >= 4 or n <= -3) else 0


def rounded(x: float, *errs: float, sig: int = 2) -> tuple[list[str], int]:
    """Strings of ``x`` and ``errs`` rounded at the decimal place of 2 significant digits of the
    smallest positive error, after factoring out 10^n (returned; 0 when none)."""
    n = _sci_exponent(x, *errs)
    good = [e for e in errs if np.isfinite(e) and e > 0]
    if not np.isfinite(x):
        return [str(x)] + [str(e) for e in errs], 0
    xd = _dec(x).scaleb(-n)
    if not good:
        return [f"{float(xd):.6g}"] + ["0" if e == 0 else str(e) for e in errs], n
    place = _decimal_place(_dec(min(good)).scaleb(-n), sig)
    out = [_fmt_at(xd, place)]
    for e in errs:
        out.append(_fmt_at(_dec(e).scaleb(-n), place) if np.isfinite(e) else str(e))
    return out, n


def _wrap(body: str, n: int, tex: bool, paren: bool = True) -> str:
    if n == 0:
        return body
    if tex:
        return (f"({body})" if paren else body) + rf" \times 10^{{{n}}}"
    return (f"({body})" if paren else body) + f" ×10^{n}"


def format_value(x: float, err: float, tex: bool = True) -> str:
    """``x ± err`` rounded by the uncertainty.

    The error keeps two significant digits (after rounding, so 0.0996 → 0.10) and the value is rounded
    to the same decimal place, half away from zero on the decimal representation. Values of magnitude
    ≥ 10^4 or < 10^-3 have their power of ten factored out: ``(2.100 \\pm 0.030) \\times 10^{-9}``.
    A zero or non-finite error gives the value to six significant digits. ``tex=False`` uses "±" and
    "×10^n" for plain text.
    """
    (xs, es), n = rounded(x, err)
    if not (np.isfinite(err) and err > 0):
        return _wrap(xs, n, tex, paren=False)
    pm = r" \pm " if tex else " ± "
    return _wrap(xs + pm + es, n, tex)


def format_asym(x: float, up: float, down: float, tex: bool = True) -> str:
    """``x^{+up}_{-down}`` rounded by the smaller of the two errors (plain text: ``x +up/−down``)."""
    (xs, us, ds), n = rounded(x, up, down)
    body = f"{xs}^{{+{us}}}_{{-{ds}}}" if tex else f"{xs} +{us}/−{ds}"
    return _wrap(body, n, tex)


def format_interval(lo: float, hi: float, scale: float, tex: bool = False) -> str:
    """``[lo, hi]`` rounded at the decimal place of 2 significant digits of ``scale``."""
    if not (np.isfinite(scale) and scale > 0):
        return f"[{lo:.6g}, {hi:.6g}]"
    n = _sci_exponent(lo, hi, scale)
    place = _decimal_place(_dec(scale).scaleb(-n), 2)
    body = f"[{_fmt_at(_dec(lo).scaleb(-n), place)}, {_fmt_at(_dec(hi).scaleb(-n), place)}]"
    return _wrap(body, n, tex, paren=False)


def format_number(v: float, scale: float, tex: bool = False) -> str:
    """One number rounded at the place of 2 significant digits of ``scale``."""
    if not np.isfinite(v):
        return "—"
    if not (np.isfinite(scale) and scale > 0):
        return f"{v:.6g}"
    n = _sci_exponent(v, scale)
    place = _decimal_place(_dec(scale).scaleb(-n), 2)
    return _wrap(_fmt_at(_dec(v).scaleb(-n), place), n, tex, paren=False)


def scale(c) -> float:
    """Rounding scale of a `Constraint`: the smaller half of its 68 % interval (sd if degenerate)."""
    a, b = c.hi68 - c.median, c.median - c.lo68
    w = min(a, b)
    return w if w > 0 else c.sd
