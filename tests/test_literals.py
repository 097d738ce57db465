"""Every double the compiler writes reads back bit for bit in each engine.

The reference is the Python float itself (an IEEE 754 binary64 value); the engines are
embedded DuckDB and the standard library's SQLite. A literal that an engine reads one unit
off would move a split bound or a leaf value, so the check compares bit patterns.
"""

from __future__ import annotations

import random
import sqlite3
import struct

import duckdb
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tree2sql import shortest
from tree2sql.dialects import load_profile
from tree2sql.exact import EXACT_ARITHMETIC, SHORTEST, bounds, float_text
from tree2sql.forest import Comparison

BATCH = 400  # literals per SELECT


@np.errstate(invalid="ignore", over="ignore")  # random bit patterns include NaN and inf
def adversarial_doubles() -> list[float]:
    rng = np.random.default_rng(1234)
    bits = rng.integers(0, 2**64, 2500, dtype=np.uint64).view(np.float64)
    single_bits = rng.integers(0, 2**32, 500, dtype=np.uint64).astype(np.uint32)
    singles = single_bits.view(np.float32).astype(np.float64)
    mids = bounds(singles[np.isfinite(singles)], Comparison.FLOAT32_LE)  # split bounds
    subnormal = np.array([5e-324, 2 * 5e-324, 2.2250738585072009e-308,
                          2.2250738585072014e-308, 1e-310, 4.9406564584124654e-324])
    huge = np.array([1.7976931348623157e308, 1.7976931348623155e308, 1e308, 9.999e307])
    rand = random.Random(99)
    decimals = [float(f"{rand.randint(1, 10**d - 1)}e{rand.randint(-30, 30)}")
                for d in (1, 3, 6, 9, 12, 15) for _ in range(150)]
    tenths = [k / 10 for k in range(-30, 31)] + [0.1 + 0.2, 1 / 3, 2 / 3, 0.1, 0.7]
    values = np.concatenate([bits, mids, subnormal, huge, decimals, tenths, [0.0, -0.0]])
    values = values[np.isfinite(values)]
    values = np.concatenate([values, -values, np.nextafter(values, np.inf)])
    return [float(v) for v in values if np.isfinite(v)]


VALUES = adversarial_doubles()


def bits(x: float) -> bytes:
    return struct.pack("<d", x)


def read_back(run, profile_name: str) -> list[float]:
    profile = load_profile(profile_name)
    out: list[float] = []
    for start in range(0, len(VALUES), BATCH):
        chunk = VALUES[start:start + BATCH]
        literals = profile.doubles(np.array(chunk))  # in bulk, as the compiler writes them
        assert literals == [profile.double(v) for v in chunk]  # one at a time: the same
        select = ", ".join(f"{text} AS v{i}" for i, text in enumerate(literals))
        out.extend(float(v) for v in run(f"SELECT {select}"))
    return out


def duckdb_row(sql: str):
    return duckdb.connect().execute(sql).fetchone()


def sqlite_row(sql: str):
    return sqlite3.connect(":memory:").execute(sql).fetchone()


@pytest.mark.parametrize("engine", ["duckdb", "sqlite"])
def test_bulk_literals_are_the_one_at_a_time_literals(engine):
    """In bulk, values that repeat are formatted once each (sorted), values that hardly
    repeat in input order; either way, and with a suffix, each text is the literal the
    round-trip test below reads back."""
    profile = load_profile(engine)
    distinct = np.array(VALUES)
    repeating = np.repeat(distinct[:500], 7)
    for values in (distinct, repeating):
        one_by_one = [profile.double(v) for v in values.tolist()]
        assert profile.doubles(values) == one_by_one
        assert profile.doubles(values, " THEN ") == [t + " THEN " for t in one_by_one]


@pytest.mark.parametrize("engine, run", [("duckdb", duckdb_row), ("sqlite", sqlite_row)])
def test_double_literals_round_trip(engine, run):
    assert len(VALUES) > 3000
    got = read_back(run, engine)
    wrong = [(x, load_profile(engine).double(x), y) for x, y in zip(VALUES, got, strict=True)
             if bits(x) != bits(y)]
    assert not wrong, wrong[:5]


def test_sqlite_reader_is_why_sqlite_writes_arithmetic():
    """SQLite's own decimal reader misreads some shortest decimals: the reason SQLite's
    profile uses exact arithmetic. If a later SQLite reads them all, this says so."""
    con = sqlite3.connect(":memory:")
    misread = [x for x in VALUES
               if bits(x) != bits(float(con.execute(f"SELECT {float_text(x)}").fetchone()[0]))]
    assert load_profile("sqlite").raw["literal_style"] == EXACT_ARITHMETIC
    if not misread:
        pytest.skip(f"SQLite {sqlite3.sqlite_version} reads every shortest decimal exactly")
    assert len(misread) >= 1


def test_duckdb_reads_shortest_text_as_double():
    profile = load_profile("duckdb")
    assert profile.raw.get("literal_style", SHORTEST) == SHORTEST
    types = duckdb.connect().execute(
        f"SELECT typeof({profile.double(2.5)}), typeof({profile.double(1e300)}), "
        f"typeof({profile.double(-0.0)})").fetchone()
    assert types == ("DOUBLE", "DOUBLE", "DOUBLE")


def test_non_finite_values_have_no_literal():
    for style in (SHORTEST, EXACT_ARITHMETIC):
        for x in (np.inf, -np.inf, np.nan):
            with pytest.raises(ValueError):
                float_text(x, style)


# -- the bulk writer behind every shortest literal (tree2sql.shortest) ---------------------
# Reference: Python's own float repr, the shortest digits that read back as the same
# binary64 value (David Gay's correctly rounded dtoa; IEEE 754-2019 clause 5.12.2 asks
# for conversions that recover the original value).


def test_bulk_shortest_text_is_python_repr():
    special = [np.inf, -np.inf, np.nan, 1e-5, -1.5e-5, 9.999e-5, 1e-4, 10.00001, 1e16, 1e22]
    values = np.array(VALUES + special)
    assert shortest._fast_path_matches_repr()  # the installed orjson is used, not skipped
    assert shortest.shortest_texts(values) == list(map(repr, values.tolist()))


@given(st.lists(st.floats(allow_nan=False, allow_infinity=False), min_size=shortest.ONE_BY_ONE + 1,
                max_size=200))
@settings(max_examples=300, deadline=None)
def test_bulk_shortest_text_matches_repr_for_any_doubles(xs):
    assert shortest.shortest_texts(np.array(xs)) == list(map(repr, xs))


class _ScientificWriter:
    """A writer whose layout differs from repr's (always 17 significant digits): what a
    future orjson that laid numbers out differently would look like to the probe."""

    OPT_SERIALIZE_NUMPY = 0

    @staticmethod
    def dumps(values, option=0) -> bytes:
        return ("[" + ",".join(f"{v:.17g}" for v in values.tolist()) + "]").encode()


@pytest.mark.parametrize("writer", [None, _ScientificWriter()])
def test_bulk_shortest_text_falls_back_to_repr(monkeypatch, writer):
    """Without orjson, or with one whose layout the probe does not recognise, every value
    goes through repr: the statement's bytes never depend on the orjson version."""
    monkeypatch.setattr(shortest, "orjson", writer)
    shortest._fast_path_matches_repr.cache_clear()
    try:
        assert not shortest._fast_path_matches_repr()
        values = np.array(VALUES[:500])
        assert shortest.shortest_texts(values) == list(map(repr, values.tolist()))
    finally:
        monkeypatch.undo()
        shortest._fast_path_matches_repr.cache_clear()
