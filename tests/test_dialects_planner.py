"""The planner switches shape as a model crosses each limit a profile states.

Each test builds models just inside and just past one limit and checks the planner's
choice, that the reason names the limit, and (where the engine runs here) that the chosen
SQL runs and agrees while the naive shape really fails.
"""

from __future__ import annotations

import functools
import sqlite3
from dataclasses import replace

import numpy as np
import pytest
import sqlglot
from engine_rows import KEY, load_rows
from sklearn.datasets import load_breast_cancer
from sklearn.ensemble import RandomForestClassifier
from sklearn.tree import DecisionTreeRegressor
from test_dialects_golden import case_nesting

from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.dialects import load_profile
from tree2sql.engines import connect
from tree2sql.errors import UserError
from tree2sql.ingest import ingest
from tree2sql.strategies import STRATEGIES, Needs, choose, limit_problem
from tree2sql.verify import verify


@functools.cache
def forest_of_depth(depth: int, trees: int = 3, rows: int = 4000):
    """Random forest on synthetic data (fixed seed) whose deepest tree is exactly `depth`."""
    rng = np.random.default_rng(depth)
    X = rng.normal(size=(rows, 8))
    y = (np.sin(3 * X[:, 0]) + X[:, 1] * X[:, 2] + rng.normal(size=rows) > 0).astype(int)
    model = RandomForestClassifier(n_estimators=trees, max_depth=depth, random_state=0,
                                   n_jobs=1).fit(X, y)
    forest = ingest(model)
    assert max(t.depth() for t in forest.trees) == depth
    return model, forest, X


@pytest.mark.parametrize(("dialect", "fits", "crosses", "nested"),
                         [("tsql", 9, 10, "nested_case"), ("sqlite", 13, 14, "leaf_counts")])
def test_case_depth_limit(dialect, fits, crosses, nested):
    """Trees within the CASE limit are walked as nested CASE (SQLite's forest classifiers
    once per tree, to their leaf counts); deeper ones get depth_staged."""
    profile = load_profile(dialect)
    limit = profile.limit("case_depth")
    strategy, _ = choose(forest_of_depth(fits)[1], profile)
    assert strategy.name == nested
    strategy, reason = choose(forest_of_depth(crosses)[1], profile)
    assert strategy.name == "depth_staged"
    assert "case_depth" in reason and str(limit) in reason
    for depth in (fits, crosses):
        sql = compile_forest(forest_of_depth(depth)[1], ScoringRequest(table="t", keys=("k",)),
                             dialect).sql
        assert case_nesting(sqlglot.parse_one(sql, read=dialect)) <= limit


def test_sqlite_parser_limit_is_real_and_avoided(tmp_path):
    """Nested CASE for depth-20 trees overflows SQLite's parser; the planner's shape runs."""
    model, forest, X = forest_of_depth(20, trees=2)
    engine = connect(f"sqlite:///{tmp_path / 'deep.db'}")
    load_rows(engine, load_profile("sqlite"), "t", X[:300], forest.feature_names)
    naive = compile_forest(forest, ScoringRequest(table="t", keys=(KEY,),
                                                  strategy="nested_case"), "sqlite")
    with pytest.raises(Exception, match="parser stack overflow"):
        sqlite3.connect(tmp_path / "deep.db").execute(naive.sql).fetchall()
    report = verify(model, forest, engine, ScoringRequest(table="t", keys=(KEY,)))
    assert report.strategy == "depth_staged"
    assert report.disagreements == 0 and report.max_abs_diff <= 1e-12, report.to_text()
    engine.close()


def test_statement_bytes_limit_snowflake():
    """Snowflake's 1 MB: a small forest inlines; a large one moves into a model table."""
    profile = load_profile("snowflake")
    small = forest_of_depth(6)[1]
    assert choose(small, profile)[0].name == "nested_case"
    _, large, _ = forest_of_depth(10, trees=60)
    strategy, reason = choose(large, profile)
    assert strategy.name == "model_table"
    assert "statement_bytes" in reason
    compiled = compile_forest(large, ScoringRequest(table="t", keys=("k",)), "snowflake")
    assert compiled.strategy == "model_table"
    sizes = [len(s.encode()) for s in [*compiled.setup, compiled.sql]]
    assert max(sizes) <= profile.limit("statement_bytes")
    inline = compile_forest(large, ScoringRequest(table="t", keys=("k",),
                                                  strategy="nested_case"), "snowflake")
    assert len(inline.sql.encode()) > profile.limit("statement_bytes")  # the limit was real


def test_statement_bytes_limit_refuses_rather_than_emits():
    """No listed shape fits: a clear error, not bad SQL. ClickHouse's default max_query_size
    (256 KiB, ClickHouse docs, Settings) without the profile's session setting raising it."""
    profile = load_profile("clickhouse")
    capped = replace(profile, limits={**profile.limits, "statement_bytes": 262144},
                     strategies=("nested_case", "depth_staged"))
    assert choose(forest_of_depth(6)[1], capped)[0].name == "nested_case"
    large = forest_of_depth(10, trees=60)[1]
    with pytest.raises(UserError, match="statement_bytes"):
        choose(large, capped)
    assert choose(large, profile)[0].name == "forest_levels"  # with the raised limit


def test_expression_depth_limit_duckdb():
    """A chain-shaped regression tree ~600 deep: too deep to nest, so depth_staged."""
    X = np.arange(600, dtype=float)[:, None]
    y = 2.0 ** np.arange(600)  # each split peels off the largest value: a chain
    model = DecisionTreeRegressor(random_state=0).fit(X, y)
    forest = ingest(model)
    assert max(t.depth() for t in forest.trees) > 500
    strategy, reason = choose(forest, replace(load_profile("duckdb"),
                                              strategies=("nested_case", "depth_staged")))
    assert strategy.name == "depth_staged" and "expression_depth" in reason
    engine = connect(None)
    load_rows(engine, load_profile("duckdb"), "t", X, forest.feature_names)
    request = ScoringRequest(table="t", keys=(KEY,), strategy="depth_staged")
    report = verify(model, forest, engine, request)
    assert report.disagreements == 0, report.to_text()


@pytest.mark.parametrize(("key", "needs"), [
    ("select_columns", Needs(100, select_columns=2000)),
    ("ast_elements", Needs(400_000)),
])
def test_other_limits_are_checked(key, needs):
    profile = load_profile({"select_columns": "postgres", "ast_elements": "clickhouse"}[key])
    # only the limit under test (ClickHouse's byte limit would otherwise bind first); for
    # ast_elements ClickHouse's default max_ast_elements, 50000 (ClickHouse docs, Settings),
    # which the profile's session settings raise
    limit = 50_000 if key == "ast_elements" else profile.limit(key)
    profile = replace(profile, limits={key: limit})
    forest = forest_of_depth(3)[1]
    assert limit_problem(Needs(100), forest, profile) is None
    assert key in limit_problem(needs, forest, profile)


def test_inline_nodes_rule_of_thumb():
    profile = load_profile("postgres")
    forest = forest_of_depth(6)[1]
    assert choose(forest, profile)[0].name == "case_leaves"
    capped = replace(profile, raw={**profile.raw, "inline_nodes": forest.n_nodes - 1})
    assert choose(forest, capped)[0].name == "model_table"


def test_forced_strategy_is_kept_but_warned():
    strategy, reason = choose(forest_of_depth(10)[1], load_profile("tsql"), "nested_case")
    assert strategy.name == "nested_case" and "case_depth" in reason


def test_estimates_bound_the_real_statement():
    """The planner's byte estimates are upper bounds, and not wildly loose."""
    forest = forest_of_depth(8, trees=5)[1]
    for dialect in ("postgres", "snowflake", "tsql"):
        profile = load_profile(dialect)
        for name in ("nested_case", "depth_staged"):
            strategy, _ = choose(forest, profile, name)
            real = len(compile_forest(forest, ScoringRequest(table="t", keys=("k",),
                                                             strategy=name), dialect)
                       .sql.encode())
            estimate = strategy.needs(forest, profile).statement_bytes
            assert real <= estimate <= 4 * real, (dialect, name, real, estimate)
    # forest_levels, leaves carried down or finished rows kept. Breast cancer Wisconsin:
    # Street, Wolberg & Mangasarian (1993), UCI.
    X, y = load_breast_cancer(return_X_y=True)
    for depth in (4, None):
        forest = ingest(RandomForestClassifier(n_estimators=30, max_depth=depth,
                                               random_state=0).fit(X, y))
        profile = load_profile("clickhouse")
        strategy, _ = choose(forest, profile, "forest_levels")
        real = len(compile_forest(forest, ScoringRequest(table="t", keys=("k",),
                                                         strategy="forest_levels"),
                                  "clickhouse").sql.encode())
        estimate = strategy.needs(forest, profile).statement_bytes
        assert real <= estimate <= 4 * real, ("clickhouse", depth, real, estimate)


def test_clickhouse_passes_over_array_shapes_when_planning_would_parse_too_much():
    """ClickHouse parses a named constant's text at every reference, so planning grows with
    the elements referenced; past the profile's constant_elements (measured: 24.9 million
    elements ran out of memory) the planner takes the next shape instead. Per-level
    arrays are referenced by one stage each, whole-tree ones by every stage."""
    profile = replace(load_profile("clickhouse"),
                      strategies=("level_arrays", "nested_case", "depth_staged"))
    forest = forest_of_depth(6)[1]
    strategy, _ = choose(forest, profile)
    parsed = strategy.needs(forest, profile).constant_elements
    whole_trees = STRATEGIES["text_arrays"]().needs(forest, profile).constant_elements
    assert strategy.name == "level_arrays" and 0 < parsed < whole_trees
    capped = replace(profile, limits={**profile.limits, "constant_elements": parsed - 1})
    strategy, reason = choose(forest, capped)
    assert strategy.name == "nested_case" and "constant_elements" in reason


def test_views_and_functions_pass_over_session_variables():
    """Spark's declared_arrays keeps its node arrays in session variables, which a persisted
    view or SQL function cannot read (Spark SQL reference, "DECLARE VARIABLE"): compiled for
    one, the planner takes the next shape, and refuses the forced shape with a fix."""
    _, forest, _ = forest_of_depth(4)
    request = ScoringRequest(table="t", keys=(KEY,))
    scoring = compile_forest(forest, request, "spark")
    declares = [s for s in scoring.setup if s.startswith("DECLARE OR REPLACE VARIABLE")]
    assert scoring.strategy == "declared_arrays" and len(declares) == 3 * len(forest.trees)
    view = compile_forest(forest, request, "spark", persistent=True)
    assert view.strategy == "text_arrays" and "not declared_arrays" in view.reason
    assert not any(s.startswith("DECLARE") for s in view.setup)
    with pytest.raises(UserError, match="session variables"):
        compile_forest(forest, replace(request, strategy="declared_arrays"), "spark",
                       persistent=True)
    # Named by the model's fingerprint: two models in one session keep their own arrays.
    other = compile_forest(forest_of_depth(5)[1], request, "spark")
    names = [{s.split()[4] for s in c.setup if s.startswith("DECLARE")}
             for c in (scoring, other)]
    assert names[0] and names[1] and not names[0] & names[1]
