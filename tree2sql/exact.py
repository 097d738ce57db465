"""Exactness helpers: float32 threshold emulation and round-tripping float literals.

A database compares doubles; scikit-learn compares float32(x) with a float64 threshold.
`bounds` turns each model threshold into a double `b` such that, for every double x,
`x <= b` in SQL holds exactly when the model's own comparison holds (IEEE 754-2019,
round to nearest, ties to even, as numpy's float32 cast implements it).
"""

from __future__ import annotations

import numpy as np

from tree2sql.forest import Comparison
from tree2sql.shortest import integer_texts_bulk, shortest_texts

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
REPEAT_SAMPLE = 1000  # values float_texts looks at to tell whether they repeat


def float_text(x: float, style: str = SHORTEST) -> str:
    """SQL text for the double x in a dialect's literal style (see `float_texts`)."""
    return float_texts(np.array([x], dtype=np.float64), style)[0]


def float_texts(values: np.ndarray, style: str = SHORTEST, arithmetic: str = "{text}",
                template: str = "{text}") -> list[str]:
    """SQL text for each double in a dialect's literal style, in bulk.

    The shortest style is Python's repr (David Gay's shortest round-tripping digits),
    always with an exponent so that engines such as DuckDB read a DOUBLE, not a DECIMAL.
    The exact-arithmetic style is for engines whose decimal reader is not correctly
    rounded (SQLite 3.40 misreads about 1 in 5,000 ordinary decimals such as 0.087742647
    by one unit in the last place): see `_exact_arithmetic`; `arithmetic` is put around
    each arithmetic form, then `template` around every text (both over {text}), in the
    same pass that writes the number. Each distinct bit pattern is formatted once (a
    forest's leaf values repeat: 0, 1, small fractions); values that hardly repeat in a
    sample (a forest's bounds) are written in input order, so that reading them back in
    that order touches memory in sequence. Either way the texts are the same.
    """
    floats = np.asarray(values, dtype=np.float64).ravel()
    if not np.isfinite(floats).all():
        bad = floats[~np.isfinite(floats)][0]
        raise ValueError(f"no SQL literal for non-finite value {bad!r}")
    if style not in (SHORTEST, EXACT_ARITHMETIC):
        raise ValueError(f"unknown literal style {style!r}")
    bits = floats.view(np.int64)
    sample = bits[::max(1, len(bits) // REPEAT_SAMPLE)]  # sorting them all costs more
    if len(np.unique(sample)) > len(sample) // 2:  # hardly repeating (bounds): input order
        distinct, where = floats, None
    else:
        distinct, where = np.unique(bits, return_inverse=True)
        distinct = distinct.view(np.float64)
    before, after = template.split("{text}")
    if style == SHORTEST:
        texts = [f"{before}{t}{after}" if "e" in t else f"{before}{t}e0{after}"
                 for t in shortest_texts(distinct)]
    else:
        texts = _exact_arithmetic(distinct, arithmetic, (before, after))
    return texts if where is None else np.array(texts, dtype=object)[where].tolist()


def _exact_arithmetic(x: np.ndarray, arithmetic: str, around: tuple[str, str]) -> list[str]:
    """x as read exactly by every engine: an integer's text, or an arithmetic form put
    in `arithmetic` (over {text}); every text between the two parts of `around`.

    Integers below 2**53 and powers of ten up to 1e22 convert exactly, and one IEEE
    multiply or divide is correctly rounded, so `(S / 1eK)` is exactly x when S / 10**K
    rounds to x (Clinger's fast path); numpy's division, the same IEEE operation the
    engine performs, checks each candidate. The smallest such K gives x's shortest
    digits. Other values are written in binary (`_binary_forms`).
    """
    integral = x == np.trunc(x)
    small = integral & (np.abs(x) < EXACT_INTEGER)
    texts = np.full(len(x), None, dtype=object)
    before, after = around
    texts[small] = [f"{before}{v!r}e0{after}" for v in x[small].tolist()]  # sign of 0 kept
    opening, closing = arithmetic.split("{text}")
    wrap = (before + opening, closing + after)
    _decimal_forms(x, texts, np.flatnonzero(~integral), True, wrap)
    _decimal_forms(x, texts, np.flatnonzero(integral & ~small), False, wrap)
    _binary_forms(x, texts, np.flatnonzero(texts == None), wrap)  # noqa: E711
    return texts.tolist()


def _decimal_forms(x: np.ndarray, forms: np.ndarray, at: np.ndarray, divide: bool,
                   wrap: tuple[str, ...]) -> None:
    """Write `(S / 1eK)` (fractions; smallest K) or `(S * 1eK)` (integers past 2**53;
    largest K), between the two parts of `wrap`, into `forms[at]` where one IEEE
    operation on an integer S below 2**53 gives exactly x. The integer nearest x * 10**K
    may be one off, so its neighbours are tried too (`_candidates`)."""
    if divide:
        at, k, digits = _smallest_quotients(x, at)
    else:  # rare (integers past 2**53): every K tried at once
        every_k = np.arange(POWER_OF_TEN_EXACT, 0, -1)
        digits, found = _candidates(x[at][:, None], 10.0 ** every_k, divide)
        has = found.any(axis=1)
        first = found.argmax(axis=1)[has]
        at, k, digits = at[has], every_k[first], digits[np.flatnonzero(has), first]
    op, (opening, closing) = " / " if divide else " * ", wrap
    # Each form's tail by K, made once: per value, only the digits are formatted.
    tails = [f"{op}1e{p}){closing}" for p in range(POWER_OF_TEN_EXACT + 1)]
    forms[at] = [f"{opening}({d}{tail}" for d, tail in
                 zip(digits.astype(np.int64).tolist(), np.array(tails, dtype=object)[
                     k.astype(np.int64)].tolist(), strict=True)]


def _smallest_quotients(x: np.ndarray, at: np.ndarray) -> tuple[np.ndarray, np.ndarray,
                                                                  np.ndarray]:
    """(at, K, S) for those x[at] that are S / 10**K, with the smallest K. A form with K
    digits persists with more (10 S / 10**(K+1) is the same quotient), so the most digits
    S allows are tried first, then one fewer, and K is found by bisection only where that
    works too (most bounds need every digit: 9 in 10 of a fully grown forest's)."""
    with np.errstate(divide="ignore", over="ignore"):
        most = np.floor(np.log10((EXACT_INTEGER - 1) / np.abs(x[at])))
    most = np.clip(most, 1, POWER_OF_TEN_EXACT)
    has = _candidates(x[at], 10.0 ** most, True)[1]
    at, v, high = at[has], x[at[has]], most[has]
    fewer = np.flatnonzero((high > 1) & _candidates(v, 10.0 ** (high - 1), True)[1])
    low, below = np.ones(len(fewer)), high[fewer] - 1
    while (low < below).any():
        mid = np.floor((low + below) / 2)
        found = _candidates(v[fewer], 10.0 ** mid, True)[1]
        below, low = np.where(found, mid, below), np.where(found, low, mid + 1)
    high[fewer] = below
    return at, high, _candidates(v, 10.0 ** high, True)[0]


def _candidates(v: np.ndarray, scale: np.ndarray, divide: bool) -> tuple[np.ndarray, np.ndarray]:
    """(S, ok) per value and scale: the integer S nearest v * scale (or v / scale), or a
    neighbour, and whether S below 2**53 gives exactly v in one IEEE operation."""
    with np.errstate(over="ignore"):
        guess = np.rint(v * scale if divide else v / scale)
        digits, found = np.zeros_like(guess), np.zeros(guess.shape, dtype=bool)
        for step in (1.0, -1.0, 0.0):  # the nearest integer, tried last, wins
            s = guess + step
            ok = (np.abs(s) < EXACT_INTEGER) & ((s / scale if divide else s * scale) == v)
            digits = np.where(ok, s, digits)
            found |= ok
    return digits, found


# str(2**k): the factors the binary forms write.
_POWERS_OF_TWO = [str(2**k) for k in range(POWER_OF_TWO_STEP + 1)]


def repeated(text: str, n: int) -> np.ndarray:
    """An object array of n references to one str. np.full converts a str to a numpy
    string and back, making n new strings: 20 ms, not 1 ms, for a grown forest's nodes."""
    texts = np.empty(n, dtype=object)
    texts[:] = text
    return texts


_integer_tables: dict[str, np.ndarray] = {}  # by template: texts of 0, 1, 2, ...


def integer_texts(values: np.ndarray, template: str = "{}") -> np.ndarray:
    """str() of each integer, put in `template`, as an object array: small non-negative
    ones (node ids, slots) from a table of their texts, grown on demand but never far
    past the numbers asked for at once; others in bulk. A template spares the shape that
    writes fixed text around each number (` WHEN 7 THEN `) one string per number."""
    values = np.asarray(values).astype(np.int64)
    if not values.size:
        return np.empty(0, dtype=object)
    low, high = int(values.min()), int(values.max())
    table = _integer_tables.get(template, np.empty(0, dtype=object))
    if low < 0 or high >= max(len(table), 4 * len(values) + 4096):
        texts = integer_texts_bulk(values)
        return np.array(texts if template == "{}" else list(map(template.format, texts)),
                        dtype=object)
    if high >= len(table):
        size = max(high + 1, 2 * len(table))
        table = np.array(list(map(template.format, range(size))), dtype=object)
        _integer_tables[template] = table
    return table[values]


def _binary_forms(x: np.ndarray, forms: np.ndarray, at: np.ndarray,
                  wrap: tuple[str, ...]) -> None:
    """Write x as an odd integer times (or divided by) powers of two, each step exact:
    `(CAST(odd AS REAL) / 2**s)`, the power split in steps of at most 2**62, between the
    two parts of `wrap`."""
    if not at.size:
        return
    mantissa, power = np.frexp(x[at])
    odd = (mantissa * 2.0**53).astype(np.int64)
    zeros = np.frexp((odd & -odd).astype(np.float64))[1] - 1  # trailing zero bits
    odd, shift = odd >> zeros, power - 53 + zeros
    one_step = (shift != 0) & (np.abs(shift) <= POWER_OF_TWO_STEP)
    opening, closing = wrap
    # Each form's tail by shift (-62 .. 62), made once: per value, only the odd integer
    # is formatted.
    tails = np.array([f"){' * ' if s > 0 else ' / '}{_POWERS_OF_TWO[abs(s)]}){closing}"
                      for s in range(-POWER_OF_TWO_STEP, POWER_OF_TWO_STEP + 1)], dtype=object)
    forms[at[one_step]] = [f"{opening}(CAST({o} AS REAL{tail}" for o, tail in
                           zip(odd[one_step].tolist(),
                               tails[shift[one_step] + POWER_OF_TWO_STEP].tolist(), strict=True)]
    for i in np.flatnonzero(~one_step).tolist():
        steps, op = [f"CAST({odd[i]} AS REAL)"], " * " if shift[i] > 0 else " / "
        for done in range(0, abs(int(shift[i])), POWER_OF_TWO_STEP):
            steps.append(str(2 ** min(POWER_OF_TWO_STEP, abs(int(shift[i])) - done)))
        forms[at[i]] = f"{opening}({op.join(steps)}){closing}"
