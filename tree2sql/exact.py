"""Exactness helpers: float32 threshold emulation and round-tripping float literals.

A database compares doubles; scikit-learn compares float32(x) with a float64 threshold.
`bounds` turns each model threshold into a double `b` such that, for every double x,
`x <= b` in SQL holds exactly when the model's own comparison holds (IEEE 754-2019,
round to nearest, ties to even, as numpy's float32 cast implements it).
"""

from __future__ import annotations

import math

import numpy as np

from tree2sql.forest import Comparison

FLOAT32_MAX = float(np.finfo(np.float32).max)
# Doubles at or beyond this magnitude round to infinity when cast to float32 (the midpoint
# between FLT_MAX and 2**128; FLT_MAX's significand is odd, so the tie rounds away).
FLOAT32_OVERFLOW = (FLOAT32_MAX + 2.0**128) / 2


def _largest_float32_at_most(t: np.ndarray) -> np.ndarray:
    """Largest float32 not above each float64 in `t` (as float32)."""
    with np.errstate(over="ignore"):
        f = t.astype(np.float32)
    too_big = f.astype(np.float64) > t
    return np.where(too_big, np.nextafter(f, np.float32(-np.inf)), f)


def bounds(threshold: np.ndarray, comparison: Comparison) -> np.ndarray:
    """Double bounds b with (SQL: x <= b) == (model: x compared with threshold).

    +inf in the result means "every non-missing value goes left".
    """
    t = np.asarray(threshold, dtype=np.float64)
    if comparison is Comparison.FLOAT64_LE:
        return t.copy()
    # Stepping past FLT_MAX yields inf and inf - inf yields NaN; both are handled below.
    with np.errstate(over="ignore", invalid="ignore"):
        return _float32_bounds(t, comparison)


def _float32_bounds(t: np.ndarray, comparison: Comparison) -> np.ndarray:
    f = _largest_float32_at_most(t)
    if comparison is Comparison.FLOAT32_LT:
        # float32(x) < t  <=>  float32(x) <= largest float32 strictly below t
        exact = f.astype(np.float64) == t
        f = np.where(exact, np.nextafter(f, np.float32(-np.inf)), f)
    up = np.nextafter(f, np.float32(np.inf)).astype(np.float64)
    up = np.where(np.isposinf(up), 2.0**128, up)
    f64 = f.astype(np.float64)
    mid = (f64 + up) / 2  # exact: both have 24-bit significands
    even = (f.view(np.int32) & 1) == 0
    result = np.where(even, mid, np.nextafter(mid, -np.inf))
    # A threshold at or past float32's top lets every finite float32 through.
    return np.where(np.isposinf(f64) | (f64 >= FLOAT32_MAX), np.inf, result)


SHORTEST = "shortest"  # literal styles a dialect profile may name (`literal_style`)
EXACT_ARITHMETIC = "exact_arithmetic"
EXACT_INTEGER = 2**53  # integers below this convert to double exactly
POWER_OF_TEN_EXACT = 22  # 10**22 is the largest power of ten a double holds exactly
POWER_OF_TWO_STEP = 62  # 2**62 still fits a 64-bit integer literal


def float_text(x: float, style: str = SHORTEST) -> str:
    """SQL text for the double x in a dialect's literal style (see `exact_arithmetic_text`).

    The shortest style is Python's repr (David Gay's shortest round-tripping digits),
    always with an exponent so that engines such as DuckDB read a DOUBLE, not a DECIMAL.
    """
    x = float(x)
    if not math.isfinite(x):
        raise ValueError(f"no SQL literal for non-finite value {x!r}")
    if style == EXACT_ARITHMETIC:
        return exact_arithmetic_text(x)
    if style != SHORTEST:
        raise ValueError(f"unknown literal style {style!r}")
    text = repr(x)
    if "e" not in text:
        text += "e0"
    return text


def exact_arithmetic_text(x: float) -> str:
    """x as one IEEE operation on operands every engine reads exactly.

    For engines whose decimal reader is not correctly rounded (SQLite 3.40 misreads about
    1 in 5,000 ordinary decimals such as 0.087742647 by one unit in the last place):
    integers below 2**53 and powers of ten up to 1e22 convert exactly, and one IEEE
    multiply or divide is correctly rounded, so `(S / 1eK)` is exactly x when x's shortest
    digits S are small enough (Clinger's fast path). Other values are written in binary as
    an odd integer times powers of two, each step exact.
    """
    if x == 0.0 or (x.is_integer() and abs(x) < EXACT_INTEGER):
        return repr(x) + "e0"  # integral: read exactly, sign of zero kept
    negative, significand, exponent = shortest_digits(x)
    text = f"{'-' if negative else ''}{significand}"
    if significand < EXACT_INTEGER and 0 < -exponent <= POWER_OF_TEN_EXACT:
        return f"({text} / 1e{-exponent})"
    if significand < EXACT_INTEGER and 0 < exponent <= POWER_OF_TEN_EXACT:
        return f"({text} * 1e{exponent})"
    mantissa, power = math.frexp(x)
    odd, shift = int(mantissa * 2**53), power - 53
    while odd % 2 == 0:
        odd, shift = odd // 2, shift + 1
    steps, op = [f"CAST({odd} AS REAL)"], " * " if shift > 0 else " / "
    for done in range(0, abs(shift), POWER_OF_TWO_STEP):
        steps.append(str(2 ** min(POWER_OF_TWO_STEP, abs(shift) - done)))
    return "(" + op.join(steps) + ")"


def shortest_digits(x: float) -> tuple[bool, int, int]:
    """Nonzero x's shortest round-trip digits as (negative, S, E), x = -+S * 10**E with S
    free of trailing zeros (what Decimal(repr(x)).normalize() gives, read from the text)."""
    text = repr(x)
    negative = text[0] == "-"
    mantissa, _, power = text.lstrip("-").partition("e")
    whole, _, fraction = mantissa.partition(".")
    digits = (whole + fraction).lstrip("0")
    significand = digits.rstrip("0")
    exponent = int(power or 0) - len(fraction) + len(digits) - len(significand)
    return negative, int(significand), exponent
