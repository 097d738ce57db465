"""Gradient boosting compiled to SQL agrees with scikit-learn's own predictions, row for row.

References: scikit-learn's predict / predict_proba (single-threaded), run on datasets bundled
with scikit-learn plus synthetic rows at split boundaries, with gaps and with extreme values.
Bar (DESIGN.md): 0 label disagreements, |diff| <= 1e-12 for values without a link function,
1e-12 relative after one. Every model is checked on embedded DuckDB with both strategies.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris, load_wine
from sklearn.ensemble import (
    GradientBoostingClassifier,
    GradientBoostingRegressor,
    HistGradientBoostingClassifier,
    HistGradientBoostingRegressor,
)
from sklearn.linear_model import LinearRegression

from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.engines import DuckDBEngine
from tree2sql.errors import UserError
from tree2sql.exact import bounds
from tree2sql.forest import LEAF, Comparison, Forest, Link
from tree2sql.ingest import ingest
from tree2sql.verify import Report, verify

STRATEGIES = ("nested_case", "node_arrays")
FLOAT32_MAX = float(np.finfo(np.float32).max)  # IEEE 754 binary32 largest finite value


def score_in_duckdb(model, X: np.ndarray, strategy: str, null_cells=()) -> Report:
    """Load X (NaN kept as NaN; `null_cells` (row, col) as SQL NULL) and verify the model."""
    forest = ingest(model)
    frame = pd.DataFrame(X, columns=list(forest.feature_names))
    frame.insert(0, "id", np.arange(len(X)))
    engine = DuckDBEngine()
    engine.con.register("rows", frame)
    engine.execute("CREATE TABLE t AS SELECT * FROM rows")
    for row, col in null_cells:
        engine.execute(f'UPDATE t SET "{forest.feature_names[col]}" = NULL WHERE id = {row}')
    report = verify(model, forest, engine, ScoringRequest(table="t", keys=["id"],
                                                          strategy=strategy))
    engine.close()
    return report


def boundary_rows(forest: Forest, X: np.ndarray, per_tree: int = 3) -> np.ndarray:
    """Rows whose tested feature sits on the model threshold, on the SQL bound and one
    double either side of the bound (IEEE 754 neighbours via numpy.nextafter)."""
    base = np.median(X, axis=0)
    rows = []
    for tree in forest.trees[:20]:
        internal = np.flatnonzero(tree.left != LEAF)[:per_tree]
        b = bounds(tree.threshold[internal], forest.comparison)
        for node, bound in zip(internal, b, strict=True):
            f = int(tree.feature[node])
            if f >= forest.n_features or not np.isfinite(bound):
                continue
            for value in (tree.threshold[node], bound, np.nextafter(bound, -np.inf),
                          np.nextafter(bound, np.inf)):
                row = base.copy()
                row[f] = value
                rows.append(row)
    return np.array(rows)


def with_edge_rows(forest: Forest, X: np.ndarray) -> tuple[np.ndarray, list]:
    """X plus boundary rows, NaN rows, infinite and huge rows; and cells to set NULL."""
    edges = boundary_rows(forest, X)
    extreme = np.repeat(np.median(X, axis=0)[None, :], 6, axis=0)
    extreme[0, 0], extreme[1, 0], extreme[2, 1] = np.inf, -np.inf, 1e300
    extreme[3, 0], extreme[4, :], extreme[5, 1] = np.nan, np.nan, FLOAT32_MAX
    rows = np.vstack([X, edges, extreme])
    first = len(X) + len(edges)
    null_cells = [(first + 1, 0), (first + 3, 1)]  # NULL over -inf, and beside a NaN
    return rows, null_cells


def assert_agrees(report: Report) -> None:
    assert report.disagreements == 0, report.to_text()
    assert report.label_disagreements == 0


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_gradient_boosting_binary_breast_cancer(strategy):
    # Breast cancer Wisconsin (diagnostic): Street, Wolberg & Mangasarian 1993, UCI ML repository.
    X, y = load_breast_cancer(return_X_y=True)
    model = GradientBoostingClassifier(n_estimators=25, random_state=0).fit(X, y)
    forest = ingest(model)
    assert forest.aggregation.link is Link.SIGMOID and forest.n_outputs == 2
    rows, nulls = with_edge_rows(forest, X)
    report = score_in_duckdb(model, rows, strategy, nulls)
    assert_agrees(report)
    # GradientBoosting casts to float32 and rejects NaN, infinities and values beyond
    # float32's range (inf, 1e300), but takes FLOAT32_MAX itself: NULL scores for 5 rows.
    assert report.null_refused == 2 and report.null_missing == 3
    assert report.max_abs_diff <= 1e-12


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_gradient_boosting_multiclass_iris(strategy):
    # Iris: Fisher 1936, UCI ML repository.
    X, y = load_iris(return_X_y=True)
    model = GradientBoostingClassifier(n_estimators=15, random_state=0).fit(X, y)
    forest = ingest(model)
    assert forest.aggregation.link is Link.SOFTMAX and len(forest.trees) == 45
    rows, nulls = with_edge_rows(forest, X)
    assert_agrees(score_in_duckdb(model, rows, strategy, nulls))


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_gradient_boosting_regressor_diabetes_is_bit_exact(strategy):
    # Diabetes: Efron, Hastie, Johnstone & Tibshirani 2004, "Least Angle Regression".
    X, y = load_diabetes(return_X_y=True)
    model = GradientBoostingRegressor(n_estimators=30, learning_rate=0.3,
                                      random_state=0).fit(X, y)
    rows, nulls = with_edge_rows(ingest(model), X)
    report = score_in_duckdb(model, rows, strategy, nulls)
    assert_agrees(report)
    assert report.max_abs_diff == 0.0  # same additions in the same order as predict_stages


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_gradient_boosting_exponential_loss_and_zero_init(strategy):
    # Breast cancer Wisconsin: Street, Wolberg & Mangasarian 1993.
    X, y = load_breast_cancer(return_X_y=True)
    model = GradientBoostingClassifier(loss="exponential", init="zero", n_estimators=10,
                                       random_state=0).fit(X, y)
    assert ingest(model).aggregation.initial == (0.0,)
    assert_agrees(score_in_duckdb(model, X, strategy))


def test_gradient_boosting_with_a_row_dependent_init_is_named():
    X, y = load_diabetes(return_X_y=True)
    model = GradientBoostingRegressor(init=LinearRegression(), n_estimators=3).fit(X, y)
    with pytest.raises(UserError, match="LinearRegression"):
        ingest(model)


def nan_sprinkled(X: np.ndarray, share: float, seed: int) -> np.ndarray:
    X = X.copy()
    X[np.random.default_rng(seed).random(X.shape) < share] = np.nan
    return X


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_hist_gradient_boosting_binary_with_gaps_and_infinities(strategy):
    # Breast cancer Wisconsin: Street, Wolberg & Mangasarian 1993; gaps added at random
    # so the model learns a missing direction per split.
    X, y = load_breast_cancer(return_X_y=True)
    X = nan_sprinkled(X, 0.1, seed=1)
    model = HistGradientBoostingClassifier(max_iter=15, random_state=0).fit(X, y)
    forest = ingest(model)
    assert forest.comparison is Comparison.FLOAT64_LE
    rows, nulls = with_edge_rows(forest, X)
    report = score_in_duckdb(model, rows, strategy, nulls)
    assert_agrees(report)
    # It reads X as float64 and takes NaN, infinities and huge values: nothing is NULL.
    assert report.null_scores == 0 and report.null_refused == 0


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_hist_gradient_boosting_multiclass_wine(strategy):
    # Wine: Forina et al., UCI ML repository (Aeberhard, Coomans & de Vel 1992).
    X, y = load_wine(return_X_y=True)
    model = HistGradientBoostingClassifier(max_iter=15, random_state=0).fit(X, y)
    rows, nulls = with_edge_rows(ingest(model), X)
    assert_agrees(score_in_duckdb(model, rows, strategy, nulls))


@pytest.mark.parametrize("loss", ["squared_error", "poisson"])
@pytest.mark.parametrize("strategy", STRATEGIES)
def test_hist_gradient_boosting_regressor_diabetes(strategy, loss):
    # Diabetes: Efron et al. 2004. Poisson uses a log link: exp(raw) in SQL.
    X, y = load_diabetes(return_X_y=True)
    model = HistGradientBoostingRegressor(loss=loss, max_iter=15, random_state=0).fit(X, y)
    forest = ingest(model)
    assert forest.aggregation.link is (Link.EXP if loss == "poisson" else Link.IDENTITY)
    rows, nulls = with_edge_rows(forest, nan_sprinkled(X, 0.05, seed=2))
    report = score_in_duckdb(model, rows, strategy, nulls)
    assert_agrees(report)
    if loss == "squared_error":
        assert report.max_abs_diff == 0.0


def categorical_rows(n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Synthetic: feature 0 a numeric category code (5 codes, one fractional), feature 1 a
    measurement; the outcome depends on both."""
    rng = np.random.default_rng(seed)
    codes = np.array([0.0, 1.0, 2.0, 5.0, 7.5])
    category = rng.choice(codes, n)
    reading = rng.normal(size=n)
    y = ((np.isin(category, [1.0, 7.5]) ^ (reading > 0.3)) | (rng.random(n) < 0.1)).astype(int)
    X = np.column_stack([category, reading])
    X[rng.random(n) < 0.05, 0] = np.nan
    return X, y


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_hist_gradient_boosting_native_categories(strategy):
    X, y = categorical_rows(600, seed=3)
    model = HistGradientBoostingClassifier(categorical_features=[0], max_iter=20,
                                           random_state=0).fit(X, y)
    forest = ingest(model)
    assert forest.derived, "the model should split on the category"
    # Unknown categories (3, 100, -1, 7.4999) and gaps follow each split's missing direction.
    unseen = np.array([[3.0, 0.1], [100.0, -1.0], [-1.0, 0.5], [7.4999, 2.0], [np.nan, 0.0],
                       [7.5, np.inf], [1.0, -np.inf]])
    assert_agrees(score_in_duckdb(model, np.vstack([X, unseen]), strategy))


def test_hist_gradient_boosting_categories_are_ordered_like_the_library():
    # The library moves categorical columns first; the SQL must read the original columns.
    X, y = categorical_rows(400, seed=4)
    X = X[:, ::-1].copy()
    model = HistGradientBoostingClassifier(categorical_features=[1], max_iter=10,
                                           random_state=0).fit(X, y)
    assert all(test.feature == 1 for test in ingest(model).derived)
    assert_agrees(score_in_duckdb(model, X, "nested_case"))


def test_hist_gradient_boosting_text_categories_are_refused():
    frame = pd.DataFrame({"carrier": pd.Categorical(["a", "b", "c"] * 20),
                          "hours": np.arange(60.0)})
    model = HistGradientBoostingClassifier(categorical_features="from_dtype", max_iter=3)
    model.fit(frame, np.arange(60) % 2)
    with pytest.raises(UserError, match="text categories"):
        ingest(model)


def test_sigmoid_sql_survives_extreme_raw_scores():
    # A raw score far beyond exp's range must give 0 or 1, not an engine error or NaN.
    X, y = load_breast_cancer(return_X_y=True)
    model = GradientBoostingClassifier(n_estimators=3, random_state=0).fit(X, y)
    forest = ingest(model)
    extreme = forest.aggregation.__class__(mean=False, initial=(-5000.0,),
                                           link=Link.SIGMOID, tree_output=(0, 0, 0))
    shifted = Forest(forest.task, forest.trees, forest.feature_names, forest.comparison,
                     forest.accepts_missing, forest.classes, aggregation=extreme)
    engine = DuckDBEngine()
    frame = pd.DataFrame(X[:5], columns=list(forest.feature_names))
    frame.insert(0, "id", np.arange(5))
    engine.con.register("rows", frame)
    compiled = compile_forest(shifted, ScoringRequest(table="rows", keys=["id"]))
    result = engine.query(compiled.sql)
    np.testing.assert_array_equal(result[compiled.score_columns[1]], np.zeros(5))
    np.testing.assert_array_equal(result[compiled.score_columns[0]], np.ones(5))


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_split_on_gaps_sends_infinity_left(strategy):
    # When a feature's gaps carry the signal the library splits "all values left, gaps
    # right" with threshold +inf, and +inf <= +inf sends an infinite value left (IEEE 754).
    rng = np.random.default_rng(0)
    y = rng.integers(0, 2, 400)
    X = rng.normal(size=(400, 2))
    X[(y == 1) & (rng.random(400) < 0.8), 0] = np.nan
    model = HistGradientBoostingClassifier(max_iter=5, random_state=0).fit(X, y)
    assert any(np.isposinf(tree.threshold).any() for tree in ingest(model).trees)
    rows = np.array([[np.inf, 0.0], [-np.inf, 0.0], [1.0, np.inf], [np.nan, 0.0], [0.0, 0.0]])
    assert_agrees(score_in_duckdb(model, rows, strategy))
