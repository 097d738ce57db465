"""`repr()` of many doubles at once: the shortest digits that read back as the same double.

Why: formatting the bounds is most of a compile (a forest of 100 trees has about 73,000
distinct bounds, and `repr` costs about 0.5 us each here). orjson writes a numpy array of
doubles in one call with Ryu (Adams, PLDI 2018), which gives the same shortest,
closest digits as Python's repr (David Gay's dtoa, mode 0) in a different layout; three
byte-level rewrites of the whole text give repr's layout:

* Ryu writes 1.5e-05 as `0.000015` (fixed notation down to 1e-5), repr only down to 1e-4;
* Ryu writes exponents bare (`e16`, `e-7`), repr with a sign and at least two digits.

The statement is therefore byte for byte what `repr` gives. Because another orjson
version could lay numbers out differently, the fast path is used only after it has
matched `repr` on a probe of values from every notation range (checked once per
process); otherwise, or without orjson, each value goes through `repr`.
"""

from __future__ import annotations

import functools
import re

import numpy as np

try:  # optional: without it every value goes through repr
    import orjson
except ImportError:  # pragma: no cover - orjson is a declared dependency
    orjson = None

_FIVE_ZEROS = re.compile(rb"0\.0000([1-9])(\d*)")  # 1e-5 <= |x| < 1e-4 in fixed notation
_BARE_EXPONENT = re.compile(rb"e(?=\d)")
_ONE_DIGIT_EXPONENT = re.compile(rb"e([+-])(\d)(?!\d)")
ONE_BY_ONE = 16  # at most this many values: one call each (no probe, no bulk call)
# Values at the edges of each notation range (and of the double range), for the probe.
_EDGES = [0.0, -0.0, 5e-324, 2.2250738585072014e-308, 1e-7, 9.5e-6, 1e-5, 1.5e-5, 9.999e-5,
          1e-4, 1.25e-4, 0.1, 1.0, -123.25, 1e15, 1234567890123456.0, 1e16, 1.5e16, 1e22,
          12345678901234567890.0, 1.7976931348623157e308]


def shortest_texts(values: np.ndarray) -> list[str]:
    """repr() of each value, in bulk."""
    floats = np.ascontiguousarray(values, dtype=np.float64).ravel()
    if len(floats) <= ONE_BY_ONE or not _fast_path_matches_repr():
        return list(map(float.__repr__, floats.tolist()))
    texts = _fast(floats)
    for at in np.flatnonzero(~np.isfinite(floats)).tolist():  # JSON has no inf or nan
        texts[at] = repr(float(floats[at]))
    return texts


def integer_texts_bulk(values: np.ndarray) -> list[str]:
    """str() of each 64-bit integer, in bulk (JSON writes integers as plain digits, so no
    probe is needed)."""
    integers = np.ascontiguousarray(values, dtype=np.int64).ravel()
    if orjson is None or len(integers) <= ONE_BY_ONE:
        return list(map(str, integers.tolist()))
    return orjson.dumps(integers, option=orjson.OPT_SERIALIZE_NUMPY)[1:-1].decode(
        "ascii").split(",")


def _five_zeros(match: re.Match[bytes]) -> bytes:
    """`0.0000d...` -> `d.…e-05`, unless the match is the tail of a longer number."""
    if match.string[match.start() - 1] in b"0123456789.":
        return match.group(0)
    rest = match.group(2)
    return match.group(1) + (b"." + rest if rest else b"") + b"e-05"


def _fast(floats: np.ndarray) -> list[str]:
    text = orjson.dumps(floats, option=orjson.OPT_SERIALIZE_NUMPY)  # b"[x,y,...]"
    if b"0.0000" in text:
        text = _FIVE_ZEROS.sub(_five_zeros, text)
    text = _BARE_EXPONENT.sub(b"e+", text)
    text = _ONE_DIGIT_EXPONENT.sub(rb"e\g<1>0\2", text)
    return text[1:-1].decode("ascii").split(",")


@functools.cache
def _fast_path_matches_repr() -> bool:
    """Whether the installed orjson, rewritten as above, gives repr's text on the probe:
    the edges of every notation range, 2,048 doubles spread over the decimal exponents
    and 256 scattered bit patterns (a multiplicative hash; no random generator to start)."""
    if orjson is None:
        return False
    i = np.arange(1024, dtype=np.uint64)
    mantissas = ((i * np.uint64(2654435761)) % np.uint64(10**9) + np.uint64(1)) / 1e8
    spread = mantissas * 10.0 ** (i % np.uint64(61)).astype(np.float64) * 1e-30
    patterns = ((i[:256] * np.uint64(0x9E3779B97F4A7C15)) >> np.uint64(1)).view(np.float64)
    probe = np.concatenate([_EDGES, spread, -spread, patterns[np.isfinite(patterns)]])
    return _fast(probe) == list(map(float.__repr__, probe.tolist()))
