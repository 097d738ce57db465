"""Golden SQL for every dialect, parsed back by sqlglot in that dialect and held to the
profile's limits.

The engines this project cannot run (tsql, snowflake, bigquery, databricks, trino, oracle,
redshift, mysql) are checked here by their SQL text; the five executed engines also get
golden files so a change in their SQL shows up in review.

Regenerate after an intended change, then review the diff:

    UPDATE_GOLDEN=1 python -m pytest tests/test_dialects_golden.py
"""

from __future__ import annotations

import functools
import os
from pathlib import Path

import pytest
import sqlglot
from sklearn.datasets import load_iris
from sklearn.ensemble import RandomForestClassifier
from sqlglot import exp

from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.dialects import available, load_profile
from tree2sql.ingest import ingest

GOLDEN = Path(__file__).parent / "golden"
UPDATE = os.environ.get("UPDATE_GOLDEN") == "1"
SHAPES = ("nested_case", "depth_staged", "model_table")
DIALECTS = ["bigquery", "clickhouse", "databricks", "duckdb", "mysql", "oracle", "postgres",
            "redshift", "snowflake", "spark", "sqlite", "trino", "tsql"]


@functools.cache
def small_forest():
    """Three depth-3 trees on iris (Fisher 1936; UCI ML repository), fixed seed."""
    X, y = load_iris(return_X_y=True)
    model = RandomForestClassifier(n_estimators=3, max_depth=3, random_state=7).fit(X, y)
    return ingest(model)


@functools.cache
def compiled(dialect: str, strategy: str | None = None):
    request = ScoringRequest(table="sales.iris rows", keys=("row id",), strategy=strategy)
    return compile_forest(small_forest(), request, dialect)


def case_nesting(tree: exp.Expression) -> int:
    """Deepest chain of CASE expressions nested in one another (sqlglot's parse tree)."""
    deepest = 0
    stack = [(tree, 0)]
    while stack:
        node, depth = stack.pop()
        if isinstance(node, exp.Case):
            depth += 1
            deepest = max(deepest, depth)
        stack.extend((child, depth) for child in node.iter_expressions())
    return deepest


def test_all_thirteen_dialects_have_profiles():
    assert sorted(available()) == sorted(DIALECTS)


@pytest.mark.parametrize("strategy", SHAPES)
@pytest.mark.parametrize("dialect", DIALECTS)
def test_golden_sql(dialect, strategy):
    query = compiled(dialect, strategy)
    path = GOLDEN / dialect / f"{strategy}.sql"
    if UPDATE:
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(query.script + "\n", encoding="utf-8")
    assert path.is_file(), f"missing {path}: run UPDATE_GOLDEN=1 python -m pytest {__file__}"
    assert path.read_text(encoding="utf-8") == query.script + "\n", \
        f"{path} differs from the compiler's output; review, then regenerate with UPDATE_GOLDEN=1"


@pytest.mark.parametrize("strategy", SHAPES)
@pytest.mark.parametrize("dialect", DIALECTS)
def test_golden_sql_parses_in_its_dialect_within_limits(dialect, strategy):
    """sqlglot reads every statement back in the same dialect; CASE depth and size fit."""
    profile = load_profile(dialect)
    query = compiled(dialect, strategy)
    for statement in [*query.setup, query.sql]:
        tree = sqlglot.parse_one(statement, read=profile.sqlglot_dialect)
        assert tree is not None
    select = sqlglot.parse_one(query.sql, read=profile.sqlglot_dialect)
    assert isinstance(select, exp.Select)
    case_limit = profile.limit("case_depth")
    if case_limit:
        assert case_nesting(select) <= case_limit
    size_limit = profile.limit("statement_bytes")
    if size_limit:
        assert max(len(s.encode()) for s in [*query.setup, query.sql]) <= size_limit


@pytest.mark.parametrize("dialect", DIALECTS)
def test_identifiers_are_quoted_through_sqlglot(dialect):
    """A table name with a space and a dot-qualified schema survives as two identifiers."""
    profile = load_profile(dialect)
    select = sqlglot.parse_one(compiled(dialect).sql, read=profile.sqlglot_dialect)
    tables = {(t.db, t.name) for t in select.find_all(exp.Table)}
    assert ("sales", "iris rows") in tables
    columns = {c.name for c in select.find_all(exp.Column)}
    assert "row id" in columns


@pytest.mark.parametrize("dialect", DIALECTS)
def test_double_literals_parse_as_the_same_double(dialect):
    """Each literal the profile writes holds the shortest text that round-trips (repr)."""
    profile = load_profile(dialect)
    if profile.raw.get("literal_style", "shortest") != "shortest":
        pytest.skip("written as exact arithmetic, checked by executing it (test_literals.py)")
    for value in (0.1, -2.2250738585072014e-308, 1.7976931348623157e308, 5e-324, 3.0):
        literal = sqlglot.parse_one(f"SELECT {profile.double(value)}",
                                    read=profile.sqlglot_dialect)
        numbers = [n for n in literal.find_all(exp.Literal)]
        assert any(float(n.this) in (value, -value) for n in numbers), (dialect, literal.sql())
