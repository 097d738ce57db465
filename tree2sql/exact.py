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
    f = _largest_float32_at_most(t)
    if comparison is Comparison.FLOAT32_LT:
        # float32(x) < t  <=>  float32(x) <= largest float32 strictly below t
        exact = f.astype(np.float64) == t
        f = np.where(exact, np.nextafter(f, np.float32(-np.inf)), f)
    up = np.nextafter(f, np.float32(np.inf)).astype(np.float64)
    up = np.where(np.isposinf(up), 2.0**128, up)
    f64 = f.astype(np.float64)
    with np.errstate(invalid="ignore"):
        mid = (f64 + up) / 2  # exact: both have 24-bit significands
    even = (f.view(np.int32) & 1) == 0
    result = np.where(even, mid, np.nextafter(mid, -np.inf))
    # A threshold at or past float32's top lets every finite float32 through.
    return np.where(np.isposinf(f64) | (f64 >= FLOAT32_MAX), np.inf, result)


def float_text(x: float) -> str:
    """Shortest decimal text that parses back to the same double, always with an exponent.

    The exponent makes engines such as DuckDB read the literal as DOUBLE rather than
    DECIMAL; Python's repr is the shortest round-tripping form (David Gay's algorithm).
    """
    x = float(x)
    if not math.isfinite(x):
        raise ValueError(f"no SQL literal for non-finite value {x!r}")
    text = repr(x)
    if "e" not in text:
        text += "e0"
    return text
