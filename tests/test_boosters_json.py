"""XGBoost and LightGBM boosters, read from their own model files, agree with the libraries.

References: each library's own predictions, single-threaded (nthread=1 / num_threads=1), on
datasets bundled with scikit-learn, with NaN and NULL cells, infinite and beyond-float32
values, and rows on the split boundaries: for XGBoost (float32(x) < t) the float32 rounding
midpoints around each threshold and the doubles one ulp either side of them (IEEE 754, as
numpy's nextafter gives them); for LightGBM (x <= t in float64) each threshold and one ulp
either side, plus LightGBM's zero band (|x| <= kZeroThreshold, read as 0.0).

XGBoost sums float32 leaf values in float32; the SQL sums the same values in float64. The
reference for XGBoost is therefore the library's own leaf per row and tree (pred_leaf)
summed in float64 (see tree2sql/ingest/xgboost_json.py), and these tests also check that it
stays within float32 rounding of the library's own float32 predictions and gives the same
labels. LightGBM sums float64 and is the reference as it is.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from engine_rows import KEY, load_rows, strategies_for
from helpers import STRATEGIES, assert_agrees, check
from sklearn.datasets import load_breast_cancer, load_diabetes, load_iris

from tree2sql.cli import cli
from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.dialects import load_profile
from tree2sql.engines import DuckDBEngine, connect
from tree2sql.errors import UserError
from tree2sql.forest import LEAF, Comparison, Forest, Link
from tree2sql.ingest import ingest
from tree2sql.ingest.boosters import require
from tree2sql.ingest.lightgbm_json import K_ZERO
from tree2sql.loading import load_model
from tree2sql.verify import verify

xgb = pytest.importorskip("xgboost")
lgb = pytest.importorskip("lightgbm")

FLOAT32_MAX = float(np.finfo(np.float32).max)  # IEEE 754 binary32 largest finite value


def sprinkled(X: np.ndarray, share: float, seed: int) -> np.ndarray:
    """X with a share of cells set to NaN, so the boosters learn a missing direction."""
    X = X.copy()
    X[np.random.default_rng(seed).random(X.shape) < share] = np.nan
    return X


def internal_splits(forest: Forest, limit: int = 120) -> list[tuple[int, float]]:
    """(feature, threshold) of the first splits of every tree, up to `limit`."""
    splits = []
    per_tree = max(1, limit // len(forest.trees))
    for tree in forest.trees:
        for node in np.flatnonzero(tree.left != LEAF)[:per_tree]:
            if int(tree.feature[node]) < forest.n_features:
                splits.append((int(tree.feature[node]), float(tree.threshold[node])))
    return splits


def float32_midpoint_values(t: float) -> list[float]:
    """For a float32 threshold t: t, its float32 neighbours, the exact midpoints between
    t and each neighbour (where float32 rounding changes, ties to even) and the doubles one
    ulp either side of each midpoint."""
    t32 = np.float32(t)
    values = [t]
    for neighbour in (np.nextafter(t32, np.float32(-np.inf)),
                      np.nextafter(t32, np.float32(np.inf))):
        if not np.isfinite(neighbour):
            continue
        mid = (float(t32) + float(neighbour)) / 2  # exact: 24-bit significands
        values += [float(neighbour), mid, np.nextafter(mid, -np.inf), np.nextafter(mid, np.inf)]
    return values


def ulp_values(t: float) -> list[float]:
    return [t, np.nextafter(t, -np.inf), np.nextafter(t, np.inf)]


def edge_rows(X: np.ndarray) -> np.ndarray:
    """Infinite, beyond-float32 and float32-max rows; one row missing each feature in turn;
    one row missing every feature."""
    base = np.nanmedian(X, axis=0)
    extreme = np.repeat(base[None, :], 4, axis=0)
    extreme[0, 0], extreme[1, 0], extreme[2, 1], extreme[3, 1] = (np.inf, -np.inf, 1e39,
                                                                  FLOAT32_MAX)
    one_missing = np.repeat(base[None, :], X.shape[1], axis=0)
    np.fill_diagonal(one_missing, np.nan)
    return np.vstack([extreme, one_missing, np.full((2, X.shape[1]), np.nan)])


def rows_for(forest: Forest, X: np.ndarray, values_at) -> tuple[np.ndarray, np.ndarray]:
    """X, boundary rows (`values_at(threshold)` on each split's feature), edge rows; and a
    mask turning half the NaN cells (and the last all-missing row) into SQL NULL."""
    base = np.nanmedian(X, axis=0)
    boundary = []
    for feature, threshold in internal_splits(forest):
        for value in values_at(threshold):
            row = base.copy()
            row[feature] = value
            boundary.append(row)
    rows = np.vstack([X, np.array(boundary), edge_rows(X)])
    null_mask = np.isnan(rows) & (np.random.default_rng(0).random(rows.shape) < 0.5)
    null_mask[-1, :] = True
    return rows, null_mask


def check_both(model, rows: np.ndarray, null_mask: np.ndarray, strategy: str):
    report = check(model, rows, strategy=strategy, null_mask=null_mask)
    assert_agrees(report)
    assert report.label_disagreements == 0 and report.null_mismatches == 0
    return report


def assert_near_library_float32(model, rows: np.ndarray) -> None:
    """The float64 reference is XGBoost's own float32 result up to float32 rounding: its
    margins within one float32 rounding (2**-24 relative) per addition of the partial sums,
    and the same labels, on the rows the library scores."""
    keep = np.all(np.abs(np.nan_to_num(rows)) <= FLOAT32_MAX, axis=1)
    rows = rows[keep]
    library = model.library_predict(rows, output_margin=True).reshape(len(rows), -1)
    ours = model.raw(rows)
    additions = len(model.forest.trees) + 1
    scale = np.maximum(np.abs(ours), np.abs(library)).max() + 1.0
    np.testing.assert_allclose(ours, library, rtol=0, atol=additions * 2.0**-24 * scale)
    if model.forest.is_classifier:
        p = model.library_predict(rows)
        labels = (p > 0.5).astype(int) if p.ndim == 1 else np.argmax(p, axis=1)
        assert np.array_equal(model.predict(rows).astype(int), labels)


# ---------------------------------------------------------------- XGBoost


@pytest.fixture(scope="module")
def xgb_binary(tmp_path_factory):
    # Breast cancer Wisconsin (diagnostic): Street, Wolberg & Mangasarian 1993, UCI ML
    # repository; 8% of cells removed so the splits learn a default direction.
    X, y = load_breast_cancer(return_X_y=True)
    X = sprinkled(X, 0.08, seed=1)
    classifier = xgb.XGBClassifier(n_estimators=20, max_depth=4, n_jobs=1, random_state=0)
    classifier.fit(X, y)
    path = tmp_path_factory.mktemp("xgb") / "binary.json"
    classifier.save_model(path)
    return path, X, classifier


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_xgboost_binary_breast_cancer(xgb_binary, strategy):
    path, X, classifier = xgb_binary
    model = load_model(path)
    forest = ingest(model)
    assert forest.comparison is Comparison.FLOAT32_LT
    assert forest.aggregation.link is Link.SIGMOID and forest.n_outputs == 2
    rows, nulls = rows_for(forest, X, float32_midpoint_values)
    report = check_both(model, rows, nulls, strategy)
    # XGBoost refuses inf, -inf and 1e39 (beyond float32) but takes FLOAT32_MAX.
    assert report.null_refused == 3 and report.null_scores == 3
    assert_near_library_float32(model, rows)
    keep = ~np.isinf(rows).any(axis=1) & ~(np.abs(np.nan_to_num(rows)) > FLOAT32_MAX).any(axis=1)
    assert np.array_equal(classifier.predict(rows[keep]), model.predict(rows[keep]).astype(int))


@pytest.mark.parametrize("objective", ["multi:softprob", "multi:softmax"])
@pytest.mark.parametrize("strategy", STRATEGIES)
def test_xgboost_multiclass_iris(tmp_path, strategy, objective):
    # Iris: Fisher 1936, UCI ML repository. Saved through Booster.save_model.
    X, y = load_iris(return_X_y=True)
    X = sprinkled(X, 0.05, seed=2)
    booster = xgb.train({"objective": objective, "num_class": 3, "max_depth": 3, "nthread": 1,
                         "eta": 0.4}, xgb.DMatrix(X, y, missing=np.nan), 8)
    booster.save_model(tmp_path / "iris.json")
    model = load_model(tmp_path / "iris.json")
    forest = ingest(model)
    assert forest.aggregation.link is Link.SOFTMAX and len(forest.trees) == 24
    rows, nulls = rows_for(forest, X, float32_midpoint_values)
    check_both(model, rows, nulls, strategy)
    if objective == "multi:softprob":
        assert_near_library_float32(model, rows)
    else:  # the library predicts the class itself
        keep = np.all(np.abs(np.nan_to_num(rows)) <= FLOAT32_MAX, axis=1)
        assert np.array_equal(model.library_predict(rows[keep]).astype(int),
                              model.predict(rows[keep]).astype(int))


@pytest.mark.parametrize("objective", ["reg:squarederror", "count:poisson"])
@pytest.mark.parametrize("strategy", STRATEGIES)
def test_xgboost_regression_diabetes(tmp_path, strategy, objective):
    # Diabetes: Efron, Hastie, Johnstone & Tibshirani 2004, "Least Angle Regression".
    X, y = load_diabetes(return_X_y=True)
    X = sprinkled(X, 0.05, seed=3)
    regressor = xgb.XGBRegressor(objective=objective, n_estimators=15, max_depth=4, n_jobs=1)
    regressor.fit(X, y)
    regressor.save_model(tmp_path / "diabetes.json")
    model = load_model(tmp_path / "diabetes.json")
    forest = ingest(model)
    assert forest.aggregation.link is (Link.EXP if objective == "count:poisson"
                                       else Link.IDENTITY)
    rows, nulls = rows_for(forest, X, float32_midpoint_values)
    report = check_both(model, rows, nulls, strategy)
    assert_near_library_float32(model, rows)
    if objective == "reg:squarederror":
        assert report.max_abs_diff == 0.0  # same float64 additions in the same order


def test_xgboost_base_score_becomes_the_librarys_margin(xgb_binary):
    # XGBoost 3 stores base_score as a probability for binary:logistic; the margin the
    # trees add to is its logit (computed by the library in float32).
    path, _, _ = xgb_binary
    document = json.loads(path.read_text())
    p = float(document["learner"]["learner_model_param"]["base_score"].strip("[]"))
    (margin,) = ingest(load_model(path)).aggregation.initial
    assert margin == pytest.approx(np.log(p / (1 - p)), abs=1e-6)
    assert margin == float(np.float32(margin))


def test_xgboost_categorical_splits_are_refused_by_name(tmp_path):
    frame = pd.DataFrame({"carrier": pd.Categorical(list("abcab") * 40),
                          "hours": np.arange(200.0)})
    y = (frame["carrier"] == "b").to_numpy().astype(int)
    classifier = xgb.XGBClassifier(n_estimators=2, enable_categorical=True, max_cat_to_onehot=1,
                                   tree_method="hist", n_jobs=1).fit(frame, y)
    classifier.save_model(tmp_path / "categorical.json")
    with pytest.raises(UserError, match="categorical splits"):
        load_model(tmp_path / "categorical.json")


def test_xgboost_objective_without_sql_is_named(tmp_path):
    X, y = load_diabetes(return_X_y=True)
    booster = xgb.train({"objective": "reg:quantileerror", "quantile_alpha": 0.5,
                         "nthread": 1}, xgb.DMatrix(X, y), 2)
    booster.save_model(tmp_path / "quantile.json")
    with pytest.raises(UserError, match="reg:quantileerror"):
        load_model(tmp_path / "quantile.json")


# ---------------------------------------------------------------- LightGBM


def lgb_train(params: dict, X: np.ndarray, y: np.ndarray, rounds: int):
    return lgb.train({"num_threads": 1, "verbose": -1, "deterministic": True, **params},
                     lgb.Dataset(X, y), rounds)


@pytest.fixture(scope="module")
def lgb_binary(tmp_path_factory):
    # Breast cancer Wisconsin: Street, Wolberg & Mangasarian 1993; 8% of cells removed.
    X, y = load_breast_cancer(return_X_y=True)
    X = sprinkled(X, 0.08, seed=4)
    booster = lgb_train({"objective": "binary", "num_leaves": 15}, X, y, 20)
    folder = tmp_path_factory.mktemp("lgb")
    booster.save_model(folder / "binary.txt")
    (folder / "binary_dump.json").write_text(json.dumps(booster.dump_model()))
    return folder, X


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_lightgbm_binary_breast_cancer(lgb_binary, strategy):
    folder, X = lgb_binary
    model = load_model(folder / "binary.txt")
    forest = ingest(model)
    assert forest.comparison is Comparison.FLOAT64_LE
    assert forest.aggregation.link is Link.SIGMOID and forest.n_outputs == 2
    rows, nulls = rows_for(forest, X, ulp_values)
    report = check_both(model, rows, nulls, strategy)
    # LightGBM reads float64 and scores infinities and huge values: nothing is NULL.
    assert report.null_scores == 0 and report.null_refused == 0


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_lightgbm_multiclass_iris(tmp_path, strategy):
    # Iris: Fisher 1936, UCI ML repository.
    X, y = load_iris(return_X_y=True)
    X = sprinkled(X, 0.05, seed=5)
    booster = lgb_train({"objective": "multiclass", "num_class": 3, "num_leaves": 7}, X, y, 10)
    booster.save_model(tmp_path / "iris.txt")
    model = load_model(tmp_path / "iris.txt")
    forest = ingest(model)
    assert forest.aggregation.link is Link.SOFTMAX and len(forest.trees) == 30
    rows, nulls = rows_for(forest, X, ulp_values)
    check_both(model, rows, nulls, strategy)


@pytest.mark.parametrize("objective", ["regression", "poisson"])
@pytest.mark.parametrize("strategy", STRATEGIES)
def test_lightgbm_regression_diabetes(tmp_path, strategy, objective):
    # Diabetes: Efron, Hastie, Johnstone & Tibshirani 2004, "Least Angle Regression".
    X, y = load_diabetes(return_X_y=True)
    X = sprinkled(X, 0.05, seed=6)
    booster = lgb_train({"objective": objective, "num_leaves": 15}, X, y, 15)
    booster.save_model(tmp_path / "diabetes.txt")
    model = load_model(tmp_path / "diabetes.txt")
    rows, nulls = rows_for(ingest(model), X, ulp_values)
    report = check_both(model, rows, nulls, strategy)
    if objective == "regression":
        assert report.max_abs_diff == 0.0  # same float64 additions in the same order


ZERO_BAND = [0.0, -0.0, K_ZERO, -K_ZERO, np.nextafter(K_ZERO, 1.0), np.nextafter(-K_ZERO, -1.0),
             np.nextafter(K_ZERO, 0.0), 1e-36, -1e-36, 1e-300, np.nan, np.inf, -np.inf, -1.0, 1.0]


@pytest.mark.parametrize("zero_as_missing", [False, True])
@pytest.mark.parametrize("strategy", STRATEGIES)
def test_lightgbm_zero_band_and_zero_as_missing(tmp_path, strategy, zero_as_missing):
    """Synthetic: values -2, -1, 0, 1, 3 (some scaled to 1e-40) with gaps, so splits fall at
    +-kZeroThreshold; with zero_as_missing the nodes are missing_type Zero."""
    rng = np.random.default_rng(7)
    X = rng.choice([-2.0, -1.0, 0.0, 0.0, 1.0, 3.0], size=(2000, 3))
    X *= rng.choice([1.0, 1e-40, 1.0], size=X.shape)
    X[rng.random(X.shape) < 0.1] = np.nan
    y = ((np.nan_to_num(X[:, 0], nan=5.0) < 0) ^ (X[:, 1] == 0)
         ^ (np.nan_to_num(X[:, 2]) > 0)).astype(int)
    booster = lgb_train({"objective": "binary", "zero_as_missing": zero_as_missing,
                         "min_data_in_leaf": 5}, X, y, 10)
    booster.save_model(tmp_path / "zero.txt")
    model = load_model(tmp_path / "zero.txt")
    kinds = set()
    for info in model.dump["tree_info"]:
        stack = [info["tree_structure"]]
        while stack:
            node = stack.pop()
            if "split_feature" in node:
                kinds.add(node["missing_type"])
                stack += [node["left_child"], node["right_child"]]
    assert kinds == ({"Zero"} if zero_as_missing else {"NaN"})
    band = np.array(ZERO_BAND)
    rows = np.array(np.meshgrid(band, band, band[::2])).reshape(3, -1).T
    check_both(model, rows, np.zeros(rows.shape, dtype=bool), strategy)


def test_lightgbm_json_dump_compiles_and_verify_asks_for_the_text_file(lgb_binary):
    folder, X = lgb_binary
    dump = load_model(folder / "binary_dump.json")
    text = load_model(folder / "binary.txt")
    assert ingest(dump).fingerprint() == ingest(text).fingerprint()
    compiled = compile_forest(ingest(dump), ScoringRequest(table="t", keys=("id",)))
    assert "SELECT" in compiled.sql
    engine = DuckDBEngine()
    try:
        from helpers import load_rows as load_duckdb

        load_duckdb(engine, X[:20], ingest(dump).feature_names, table="t", key="id")
        with pytest.raises(UserError) as refused:
            verify(dump, ingest(dump), engine, ScoringRequest(table="t", keys=("id",)))
    finally:
        engine.close()
    assert "save_model('model.txt')" in refused.value.fix


def test_lightgbm_categorical_splits_are_refused_by_name(tmp_path):
    rng = np.random.default_rng(8)
    X = np.column_stack([rng.integers(0, 6, 400).astype(float), rng.normal(size=400)])
    y = np.isin(X[:, 0], [1, 4]).astype(int)
    booster = lgb.train({"objective": "binary", "verbose": -1, "num_threads": 1,
                         "min_data_per_group": 5, "cat_smooth": 1},
                        lgb.Dataset(X, y, categorical_feature=[0]), 3)
    booster.save_model(tmp_path / "categorical.txt")
    with pytest.raises(UserError, match="categorical splits"):
        load_model(tmp_path / "categorical.txt")


# ---------------------------------------------------------------- loading, CLI, SQLite


def test_files_are_recognised_by_content(xgb_binary, lgb_binary, tmp_path):
    xgb_path, _, _ = xgb_binary
    lgb_folder, _ = lgb_binary
    (tmp_path / "xgb.model").write_bytes(xgb_path.read_bytes())
    (tmp_path / "lgb.json").write_bytes((lgb_folder / "binary.txt").read_bytes())
    assert type(load_model(tmp_path / "xgb.model")).__name__ == "XGBoostModel"
    assert type(load_model(tmp_path / "lgb.json")).__name__ == "LightGBMModel"
    (tmp_path / "other.json").write_text('{"hello": 1}')
    with pytest.raises(UserError, match="neither an XGBoost model nor a LightGBM"):
        load_model(tmp_path / "other.json")
    (tmp_path / "broken.json").write_text('{"learner": ')
    with pytest.raises(UserError, match="not a JSON model file"):
        load_model(tmp_path / "broken.json")


def test_a_missing_library_names_the_package_to_install():
    with pytest.raises(UserError) as missing:
        require("tree2sql_no_such_module", "xgboost", "XGBoost model 'm.json'")
    assert "pip install xgboost" in missing.value.fix


@pytest.mark.parametrize("which", ["xgboost", "lightgbm"])
def test_cli_compiles_and_verifies_a_booster_file(xgb_binary, lgb_binary, tmp_path, which):
    path = xgb_binary[0] if which == "xgboost" else lgb_binary[0] / "binary.txt"
    X = xgb_binary[1] if which == "xgboost" else lgb_binary[1]
    forest = ingest(load_model(path))
    frame = pd.DataFrame(X, columns=list(forest.feature_names))
    frame.insert(0, "shipment_id", np.arange(len(X)))
    frame.to_csv(tmp_path / "rows.csv", index=False)  # NaN cells are written empty: NULL
    runner = CliRunner()
    compiled = runner.invoke(cli, ["compile", str(path), "--table", "rows", "--key",
                                   "shipment_id", "-o", str(tmp_path / "score.sql")])
    assert compiled.exit_code == 0, compiled.output
    assert "SELECT" in (tmp_path / "score.sql").read_text()
    verified = runner.invoke(cli, ["verify", str(path), "--data", str(tmp_path / "rows.csv"),
                                   "--key", "shipment_id", "--report",
                                   str(tmp_path / "report.json")])
    assert verified.exit_code == 0, verified.output
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["rows"] == len(X) and report["disagreements"] == 0
    assert report["max_abs_diff"] <= 1e-12


def test_lightgbm_dump_through_the_cli_says_which_file_to_give(lgb_binary, tmp_path):
    folder, X = lgb_binary
    pd.DataFrame(X[:10], columns=[f"Column_{i}" for i in range(X.shape[1])]).to_csv(
        tmp_path / "rows.csv", index=False)
    result = CliRunner().invoke(cli, ["verify", str(folder / "binary_dump.json"), "--data",
                                      str(tmp_path / "rows.csv")])
    assert result.exit_code == 2
    assert "save_model('model.txt')" in result.output + (result.stderr or "")


@pytest.mark.parametrize("which", ["xgboost", "lightgbm"])
def test_sqlite_agrees(xgb_binary, lgb_binary, tmp_path, which):
    # SQLite (Python's sqlite3 through SQLAlchemy) stores no NaN: gaps go in as NULL.
    path = xgb_binary[0] if which == "xgboost" else lgb_binary[0] / "binary.txt"
    X = xgb_binary[1] if which == "xgboost" else lgb_binary[1]
    model = load_model(path)
    forest = ingest(model)
    values = float32_midpoint_values if which == "xgboost" else ulp_values
    rows, _ = rows_for(forest, X, values)
    engine = connect("sqlite:///" + str(tmp_path / "rows.db"))
    try:
        load_rows(engine, load_profile("sqlite"), "rows", rows, forest.feature_names,
                  np.isnan(rows))
        for strategy in strategies_for("sqlite"):
            report = verify(model, forest, engine, ScoringRequest(table="rows", keys=(KEY,),
                                                                  strategy=strategy))
            assert_agrees(report)
            assert report.rows == len(rows)
    finally:
        engine.close()


def test_live_booster_objects_are_sent_to_their_files():
    with pytest.raises(UserError) as live:
        ingest(xgb.XGBClassifier())
    assert "save_model('model.json')" in live.value.fix
    with pytest.raises(UserError) as live:
        ingest(lgb.LGBMRegressor())
    assert "save_model('model.txt')" in live.value.fix


@pytest.mark.parametrize("text", ['{"learner": {}}', '{"learner": {"objective": 3}}',
                                  '{"tree_info": [1]}', '{"tree_info": [], "objective": "x"}'])
def test_malformed_booster_json_is_a_user_error(tmp_path, text):
    (tmp_path / "m.json").write_text(text)
    with pytest.raises(UserError):
        load_model(tmp_path / "m.json")
