"""The speed-oriented SQL shapes (benchmarks/README.md) agree exactly with scikit-learn.

References outside the project: scikit-learn's own predict_proba/predict (via
tree2sql.verify), the datasets scikit-learn bundles (sources named beside each), and
IEEE 754 doubles as numpy implements them (float32 boundary rows, NaN, infinities).
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from engine_rows import Case, assert_bar, cases, open_engine, score
from helpers import assert_agrees, check
from sklearn.datasets import load_breast_cancer, load_iris, load_wine
from sklearn.ensemble import (
    GradientBoostingClassifier,
    HistGradientBoostingClassifier,
    RandomForestClassifier,
    RandomForestRegressor,
)

from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.dialects import load_profile
from tree2sql.engines import DuckDBEngine
from tree2sql.errors import UserError
from tree2sql.exact import bounds
from tree2sql.ingest import ingest
from tree2sql.strategies import STRATEGIES, choose, text_arrays
from tree2sql.strategies.forest_levels import forest_layout
from tree2sql.strategies.level_arrays import LevelArrays
from tree2sql.strategies.text_arrays import TextArrays, preorder_positions

SPEED_SHAPES = ("text_arrays",)


@pytest.mark.parametrize("strategy", SPEED_SHAPES)
@pytest.mark.parametrize("name", ["iris", "wine", "breast_cancer_missing", "diabetes"])
def test_speed_shape_agrees_on_bundled_datasets(strategy: str, name: str) -> None:
    # Datasets and their sources: see tests/engine_rows.py (Fisher 1936; Forina et al.
    # 1988; Street, Wolberg & Mangasarian 1993; Efron et al. 2004). Rows include float32
    # boundary values, NaN and NULL cells, infinities and values beyond float32's range.
    case = cases()[name]
    report = check(case.estimator, case.X, strategy=strategy, null_mask=case.null_mask,
                   forest=case.forest)
    assert_agrees(report)
    assert report.null_scores > 0  # the refused edge rows really got NULL scores


@pytest.mark.parametrize("top_levels", [0, 1, 3, 64])
def test_text_arrays_agrees_whatever_the_case_depth(monkeypatch: pytest.MonkeyPatch,
                                                    top_levels: int) -> None:
    """All gathers (0), all CASE (64, deeper than any tree) and mixes give the same scores."""
    # breast cancer Wisconsin (diagnostic): Street, Wolberg & Mangasarian (1993); UCI.
    case = cases()["breast_cancer_missing"]
    monkeypatch.setattr(text_arrays.TextArrays.__init__, "__defaults__", (top_levels,))
    assert TextArrays().top_levels == top_levels
    assert_agrees(check(case.estimator, case.X, strategy="text_arrays",
                        null_mask=case.null_mask, forest=case.forest))


def test_text_arrays_fully_grown_trees_agree() -> None:
    """Fully grown trees are far deeper than the CASE levels: most of the walk is gathers."""
    # breast cancer Wisconsin (diagnostic): Street, Wolberg & Mangasarian (1993); UCI.
    X, y = load_breast_cancer(return_X_y=True)
    rng = np.random.default_rng(5)
    X = X.copy()
    X[rng.random(X.shape) < 0.05] = np.nan
    model = RandomForestClassifier(n_estimators=6, random_state=1, n_jobs=1).fit(X, y)
    forest = ingest(model)
    assert max(t.depth() for t in forest.trees) > text_arrays.TOP_LEVELS
    null_mask = np.isnan(X) & (rng.random(X.shape) < 0.5)
    assert_agrees(check(model, X, strategy="text_arrays", null_mask=null_mask, forest=forest))


def test_list_text_cast_round_trips_every_double() -> None:
    """DuckDB's cast from list text gives back the very doubles numpy wrote (IEEE 754)."""
    rng = np.random.default_rng(11)
    values = rng.standard_normal(20_000) * 10.0 ** rng.integers(-300, 300, 20_000)
    values = np.concatenate([values, [5e-324, 2.2250738585072014e-308, 1.7976931348623157e308,
                                      -0.0, 0.1, 1 / 3]])
    profile = load_profile("duckdb")
    sql = profile.raw["array_from_text"].format(
        text=profile.string("[" + ",".join(map(repr, values.tolist())) + "]"),
        element=profile.double_type)
    engine = DuckDBEngine()
    try:
        got = np.array(engine.con.execute(f"SELECT {sql}").fetchone()[0], dtype=np.float64)
    finally:
        engine.close()
    assert got.tobytes() == values.tobytes()


def test_missing_sentinels_order_as_the_shape_needs() -> None:
    """-inf <= every bound and NaN <= no bound, +inf included (DuckDB's NaN ordering)."""
    p = load_profile("duckdb")
    nan, inf = p.raw["nan_literal"], p.raw["infinity_literal"]
    engine = DuckDBEngine()
    try:
        row = engine.con.execute(
            f"SELECT -{inf} <= -{inf}, -{inf} <= -1.7976931348623157e308, "
            f"{nan} <= {inf}, {nan} <= 1.7976931348623157e308").fetchone()
    finally:
        engine.close()
    assert row == (True, True, False, False)


def test_layout_matches_a_plain_preorder_walk() -> None:
    """The vectorized layout and depths (worked out for every tree at once) equal the
    neutral model's own walks: a node's depth is the length of its path from the root."""
    forest = cases()["wine"].forest
    fresh = replace(forest, trees=tuple(map(replace, forest.trees)))
    for tree, depths in zip(fresh.trees, fresh.node_depths(), strict=True):
        order, position = preorder_positions(tree)
        assert order.tolist() == tree.preorder()
        assert np.array_equal(position[order], np.arange(tree.n_nodes))
        assert depths.tolist() == [len(tree.path_to(n)) - 1 for n in range(tree.n_nodes)]
        assert tree.depth() == int(depths.max())


def test_statement_holds_one_literal_per_array(monkeypatch: pytest.MonkeyPatch) -> None:
    """The node arrays are string literals, not element lists (what keeps planning short)."""
    monkeypatch.setattr(text_arrays.TextArrays.__init__, "__defaults__", (2,))
    case = cases()["iris"]
    compiled = compile_forest(case.forest, ScoringRequest("t", ("k",), strategy="text_arrays"),
                              "duckdb")
    trees = len(case.forest.trees)
    assert compiled.sql.count("AS INTEGER[])") + compiled.sql.count("AS BIGINT[])") \
        == 2 * trees
    assert compiled.sql.count("AS DOUBLE[])") >= trees * (1 + case.forest.n_outputs)


@pytest.mark.parametrize("make", [
    lambda: GradientBoostingClassifier(n_estimators=10, max_depth=3, random_state=0),
    lambda: HistGradientBoostingClassifier(max_iter=10, random_state=0),
])
def test_text_arrays_agrees_on_boosted_trees(make) -> None:
    """Summed trees with a link function go through the same leaf-finding shape."""
    # iris: R. A. Fisher (1936), Annals of Eugenics 7(2); UCI ML repository.
    X, y = load_iris(return_X_y=True)
    model = make().fit(X, y)
    assert_agrees(check(model, X, strategy="text_arrays"))


@pytest.fixture(scope="module")
def clickhouse():
    engine = open_engine("clickhouse")
    yield engine
    engine.close()


CLICKHOUSE_SHAPES = ("text_arrays", "level_arrays", "forest_levels")


@pytest.mark.parametrize("shape", CLICKHOUSE_SHAPES)
@pytest.mark.parametrize("name", sorted(cases()))
def test_arrays_as_constants_agree_on_clickhouse(clickhouse, name: str, shape: str) -> None:
    """ClickHouse's node arrays as WITH constants (whole trees, or one level per stage),
    on every bundled dataset (sources in tests/engine_rows.py): forests, boosted trees,
    regressors, NaN/NULL and edge rows."""
    report = score(clickhouse, cases()[name], shape)
    assert report.strategy == shape
    assert_bar(report, cases()[name])


@pytest.mark.parametrize("shape", CLICKHOUSE_SHAPES)
def test_arrays_as_constants_agree_on_grown_and_boosted_trees(clickhouse, shape: str) -> None:
    """Trees of uneven depth (leaves keep their node while deeper trees walk on) and
    summed trees with a link function."""
    # breast cancer: Street, Wolberg & Mangasarian (1993), UCI ML repository.
    X, y = load_breast_cancer(return_X_y=True)
    for model in (RandomForestClassifier(n_estimators=8, random_state=0),
                  HistGradientBoostingClassifier(max_iter=15, random_state=0)):
        model.fit(X, y)
        forest = ingest(model)
        case = Case(f"const_{type(model).__name__.lower()}", model, forest, X,
                    np.zeros(X.shape, dtype=bool))
        depths = {tree.depth() for tree in forest.trees}
        assert len(depths) > 1 or isinstance(model, HistGradientBoostingClassifier)
        report = score(clickhouse, case, shape)
        assert report.disagreements == 0 and report.rows == len(X), report.to_text()


@pytest.mark.parametrize("top_levels", [1, 3])
def test_level_arrays_agree_below_a_nested_case_top(clickhouse, monkeypatch: pytest.MonkeyPatch,
                                                    top_levels: int) -> None:
    """Rows start where a nested CASE of the top levels leaves them (a breadth-first
    position), then walk the per-level arrays. Breast cancer Wisconsin: Street, Wolberg &
    Mangasarian (1993), UCI; rows with NaN, NULL and float32 boundary values."""
    monkeypatch.setattr(LevelArrays.__init__, "__defaults__", (top_levels,))
    assert STRATEGIES["level_arrays"]().top_levels == top_levels
    case = cases()["breast_cancer_missing"]
    report = score(clickhouse, case, "level_arrays")
    assert report.strategy == "level_arrays"
    assert_bar(report, case)


def test_level_arrays_test_for_finished_rows_only_below_a_leaf() -> None:
    """A tree's step tests for rows already at a leaf only on the levels below its
    shallowest leaf; elsewhere no row can have finished, and each test is planning time
    (benchmarks/README.md, ClickHouse shapes). Nothing in the walk is Nullable. Breast
    cancer Wisconsin: Street, Wolberg & Mangasarian (1993), UCI."""
    forest = cases()["breast_cancer_missing"].forest
    sql = compile_forest(forest, ScoringRequest("t", ("k",), strategy="level_arrays"),
                         "clickhouse").sql
    shallowest = [int(tree.node_depths()[tree.is_leaf()].min()) for tree in forest.trees]
    tested = sum(max(0, tree.depth() - 1 - low)
                 for tree, low in zip(forest.trees, shallowest, strict=True))
    walked = sum(tree.depth() for tree in forest.trees)
    assert 0 < tested < walked
    assert sql.count(" <= 0 THEN ") == tested
    assert sql.count('"__t2s_xs"[') == walked
    assert "Array(Nullable" not in sql


def test_clickhouse_takes_named_level_arrays_past_the_parse_tree_limit() -> None:
    """A forest whose nested CASE would pass ClickHouse's default max_ast_elements (50000,
    ClickHouse docs, Settings) gets its node arrays as named constants: one literal per
    level for the whole forest, named in the stage that walks that level, nothing
    cross-joined or carried."""
    X, y = load_breast_cancer(return_X_y=True)
    forest = ingest(RandomForestClassifier(n_estimators=150, random_state=0).fit(X, y))
    strategy, _ = choose(forest, load_profile("clickhouse"))
    assert strategy.name == "forest_levels"
    compiled = compile_forest(forest, ScoringRequest("t", ("k",)), "clickhouse")
    depth = max(tree.depth() for tree in forest.trees)
    assert compiled.sql.count(' AS "__t2s_slot') == depth
    assert compiled.sql.count('AS "__t2s_slot0"') == 1
    assert "CROSS JOIN" not in compiled.sql
    assert "SET max_query_size = 1073741824" in compiled.setup


def test_clickhouse_steps_every_tree_at_once(clickhouse) -> None:
    """forest_levels writes one array map per level, whatever the number of trees, and no
    per-tree step. Leaves of a depth-limited forest are carried down to its last level, so
    no step tests for finished rows; a fully grown forest, whose leaves lie far above its
    deepest level, sends a row at a leaf to minus the leaf's number and tests for it below
    the shallowest leaf. Both agree with scikit-learn. Breast cancer Wisconsin: Street,
    Wolberg & Mangasarian (1993), UCI."""
    X, y = load_breast_cancer(return_X_y=True)
    profile = load_profile("clickhouse")
    for name, model in (
            ("limited", RandomForestClassifier(n_estimators=30, max_depth=4, random_state=0)),
            ("grown", RandomForestClassifier(n_estimators=30, random_state=0))):
        forest = ingest(model.fit(X, y))
        assert choose(forest, profile)[0].name == "forest_levels"
        sql = compile_forest(forest, ScoringRequest("t", ("k",)), "clickhouse").sql
        depth = max(tree.depth() for tree in forest.trees)
        shallowest = min(int(tree.node_depths()[tree.is_leaf()].min()) for tree in forest.trees)
        tested = 0 if name == "limited" else depth - 1 - shallowest
        assert sql.count("arrayMap(") == depth and sql.count('"__t2s_xs"[') == depth
        assert sql.count('CASE WHEN "__t2s_g" < 0 THEN') == tested
        assert (tested > 0) == (name == "grown")
        case = Case(f"levels_{name}", model, forest, X, np.zeros(X.shape, dtype=bool))
        report = score(clickhouse, case, None)
        assert report.strategy == "forest_levels"
        assert report.rows == len(X) and report.disagreements == 0, report.to_text()
        assert report.max_abs_diff <= 1e-12, report.to_text()


@pytest.mark.parametrize("carry", [True, False])
def test_forest_levels_layout_walks_to_scikit_learns_leaves(carry: bool) -> None:
    """The forest-wide level arrays, walked in numpy as the SQL walks them (a row at a leaf
    holds minus its number), reach the leaf that scikit-learn's own `apply` gives, for
    every tree and row, whether leaves are carried down or end the walk at once. Breast
    cancer Wisconsin (Street, Wolberg & Mangasarian 1993, UCI) with 8% of cells missing;
    the float32 comparison emulated by tree2sql.exact (IEEE 754 rounding)."""
    case = cases()["breast_cancer_missing"]
    forest, model = case.forest, case.estimator
    finite = np.isfinite(np.nan_to_num(case.X, nan=0.0)).all(axis=1) & (
        np.abs(np.nan_to_num(case.X)) < 3e38).all(axis=1)  # rows scikit-learn scores
    X = case.X[finite]
    depth = max(tree.depth() for tree in forest.trees)
    levels, leaves = forest_layout(forest, depth, forest.n_features,
                                   [bounds(tree.threshold, forest.comparison)
                                    for tree in forest.trees], carry)
    xs = np.column_stack([np.where(np.isnan(X), -np.inf, X), X, np.full(len(X), np.nan)])
    rows = np.arange(len(X))[:, None]
    g = np.tile(np.arange(1, len(forest.trees) + 1), (len(X), 1))
    for level in levels:
        at = np.where(g < 0, 1, g) - 1
        step = level["right"][at] - (xs[rows, level["slot"][at] - 1] <= level["bound"][at])
        g = np.where(g < 0, g, step)
    assert (g < 0).all()
    reached = np.column_stack([leaves[t][-g[:, t] - 1] for t in range(len(forest.trees))])
    assert np.array_equal(reached, model.apply(X))
    entries = sum(len(level["slot"]) for level in levels)
    assert (entries > forest.n_nodes) == carry  # carried leaves are extra entries


def test_forest_levels_agree_on_lone_leaves_and_uneven_trees(clickhouse) -> None:
    """Trees that are one leaf (a constant target) walk no level; trees of uneven depth
    carry their shallow leaves down to the deepest level. Iris: R. A. Fisher (1936),
    Annals of Eugenics 7(2); UCI ML repository."""
    X, y = load_iris(return_X_y=True)
    for name, model in (
            ("lone", RandomForestRegressor(n_estimators=3, random_state=0)
             .fit(X, np.full(len(X), 2.5))),
            ("uneven", RandomForestClassifier(n_estimators=6, max_depth=5, random_state=0)
             .fit(X, y))):
        forest = ingest(model)
        depths = [tree.depth() for tree in forest.trees]
        assert (max(depths) == 0) if name == "lone" else (min(depths) < max(depths))
        case = Case(f"levels_{name}", model, forest, X, np.zeros(X.shape, dtype=bool))
        report = score(clickhouse, case, "forest_levels")
        assert report.strategy == "forest_levels"
        assert report.rows == len(X) and report.disagreements == 0, report.to_text()
        assert report.max_abs_diff <= 1e-12, report.to_text()


def test_forest_levels_write_arrays_where_read_without_named_constants() -> None:
    """A profile with an array map but no named constants gets each level's arrays written
    where the step reads them (once each). DuckDB's `list_transform` with a lambda (DuckDB
    docs, "Lambda Functions"); its profile leaves the key out, since the shape was measured
    slower there (benchmarks/README.md). Breast cancer Wisconsin: Street, Wolberg &
    Mangasarian (1993), UCI; rows with NaN, NULL, float32 boundary and refused values."""
    profile = load_profile("duckdb")
    assert "array_map" not in profile.raw and "constant_alias" not in profile.raw
    profile = replace(profile, raw={**profile.raw,
                                    "array_map": "list_transform({array}, lambda {name}: {body})"})
    case = cases()["breast_cancer_missing"]
    engine = open_engine("duckdb")
    try:
        report = score(engine, case, "forest_levels", profile)
    finally:
        engine.close()
    assert report.strategy == "forest_levels"
    assert_bar(report, case)
    sql = compile_forest(case.forest, ScoringRequest("t", ("k",), strategy="forest_levels"),
                         profile).sql
    depth = max(tree.depth() for tree in case.forest.trees)
    assert sql.count("list_transform(") == depth and " AS \"__t2s_slot0\"" not in sql


@pytest.mark.parametrize("strategy", ["node_arrays", "text_arrays"])
def test_array_shape_forced_where_the_profile_lacks_its_syntax(strategy: str) -> None:
    """A clear error naming the missing profile keys, not a KeyError."""
    forest = cases()["iris"].forest
    with pytest.raises(UserError, match="sqlite profile has no"):
        compile_forest(forest, ScoringRequest("t", ("k",), strategy=strategy), "sqlite")


def test_case_leaves_walks_each_tree_once_for_every_output() -> None:
    """PostgreSQL's shape: one CASE per split whatever the number of classes (nested_case
    writes each tree once per class), and the leaf stage fenced by a WITH clause of its
    own so the planner cannot copy the walks back into each output. Wine: Forina et al., UCI ML
    repository (3 classes)."""
    X, y = load_wine(return_X_y=True)
    forest = ingest(RandomForestClassifier(n_estimators=5, max_depth=4, random_state=0)
                    .fit(X, y))
    splits = sum(int((~tree.is_leaf()).sum()) for tree in forest.trees)
    request = ScoringRequest("t", ("k",))
    leaves = compile_forest(forest, request, "postgres")
    assert leaves.strategy == "case_leaves"
    assert leaves.sql.count("CASE WHEN") == splits + 1 + forest.n_outputs + 1  # guard, label
    assert '"__t2s_leaves" AS (\nWITH "__t2s_fence" AS (SELECT 1)\nSELECT ' in leaves.sql
    nested = compile_forest(forest, ScoringRequest("t", ("k",), strategy="nested_case"),
                            "postgres")
    assert nested.sql.count("CASE WHEN") == splits * forest.n_outputs + 1 + forest.n_outputs + 1
