"""Model files load safely; data files load into embedded DuckDB as they are written."""

from __future__ import annotations

import collections
import copy

import duckdb
import joblib
import numpy as np
import pandas as pd
import pytest
import skops.io
from helpers import assert_agrees
from sklearn.datasets import load_breast_cancer, load_iris
from sklearn.ensemble import ExtraTreesRegressor, RandomForestClassifier

from tree2sql.compiler import ScoringRequest
from tree2sql.errors import UserError
from tree2sql.ingest import ingest
from tree2sql.loading import load_model
from tree2sql.sources import LOADED_TABLE, ROW_KEY, load_file
from tree2sql.verify import verify


@pytest.fixture(scope="module")
def iris_model():
    """iris: R. A. Fisher (1936); UCI ML repository. Fitted with feature names."""
    X, y = load_iris(return_X_y=True, as_frame=True)
    X.columns = ["sepal_length", "sepal_width", "petal_length", "petal_width"]
    return RandomForestClassifier(n_estimators=5, random_state=0).fit(X, y), X


def test_skops_round_trip_predicts_the_same(iris_model, tmp_path):
    model, X = iris_model
    skops.io.dump(model, tmp_path / "m.skops")
    loaded = load_model(tmp_path / "m.skops")
    assert np.array_equal(loaded.predict_proba(X), model.predict_proba(X))
    assert ingest(loaded).fingerprint() == ingest(model).fingerprint()


def test_skops_with_an_unlisted_type_is_refused(iris_model, tmp_path):
    model, _ = iris_model
    odd = copy.deepcopy(model)
    odd.note_ = collections.Counter(a=1)  # not a scikit-learn tree type
    skops.io.dump(odd, tmp_path / "odd.skops")
    with pytest.raises(UserError, match="collections.Counter"):
        load_model(tmp_path / "odd.skops")


def test_pickle_only_when_allowed(iris_model, tmp_path):
    model, X = iris_model
    joblib.dump(model, tmp_path / "m.joblib")
    with pytest.raises(UserError) as refused:
        load_model(tmp_path / "m.joblib")
    assert "--allow-pickle" in refused.value.fix and "skops" in refused.value.fix
    loaded = load_model(tmp_path / "m.joblib", allow_pickle=True)
    assert np.array_equal(loaded.predict(X), model.predict(X))


@pytest.mark.parametrize("cut", [0.1, 0.5, 0.99])
def test_truncated_skops_is_named_damaged(iris_model, tmp_path, cut):
    model, _ = iris_model
    whole = skops.io.dumps(model)
    path = tmp_path / "cut.skops"
    path.write_bytes(whole[: int(len(whole) * cut)])
    for allow in (False, True):
        with pytest.raises(UserError, match="damaged|cannot read|cannot load"):
            load_model(path, allow_pickle=allow)


def test_empty_model_file(tmp_path):
    (tmp_path / "m.skops").write_bytes(b"")
    with pytest.raises(UserError, match="empty"):
        load_model(tmp_path / "m.skops")


def _frame_with_gaps():
    """breast cancer Wisconsin: Street, Wolberg & Mangasarian (1993); UCI ML repository."""
    X, y = load_breast_cancer(return_X_y=True, as_frame=True)
    X.columns = [c.replace(" ", "_") for c in X.columns]
    X = X.copy()
    X.iloc[::7, 3] = np.nan  # written as empty CSV fields / Parquet nulls
    return X, y


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".duckdb"])
def test_data_files_load_and_agree(suffix, tmp_path):
    X, y = _frame_with_gaps()
    model = RandomForestClassifier(n_estimators=5, random_state=0).fit(X, y)
    path = tmp_path / f"rows{suffix}"
    table = None
    if suffix == ".csv":
        X.to_csv(path, index=False)
    elif suffix == ".parquet":
        X.to_parquet(path)
    else:
        table = "shipments"
        with duckdb.connect(str(path)) as con:
            con.register("frame", X)
            con.execute(f"CREATE TABLE {table} AS SELECT * FROM frame")
    engine, loaded = load_file(path, table, add_row_key=True)
    assert loaded == LOADED_TABLE
    nulls = engine.query(f'SELECT COUNT(*) AS n FROM "{loaded}" '
                         f'WHERE "{X.columns[3]}" IS NULL')
    assert int(nulls["n"][0]) == X.iloc[:, 3].isna().sum() > 0
    report = verify(model, ingest(model), engine,
                    ScoringRequest(table=loaded, keys=(ROW_KEY,)))
    assert_agrees(report)
    assert report.rows == len(X)


def test_regressor_from_csv_agrees(tmp_path):
    """diabetes: Efron, Hastie, Johnstone & Tibshirani (2004), "Least Angle Regression"."""
    from sklearn.datasets import load_diabetes

    X, y = load_diabetes(return_X_y=True, as_frame=True)
    model = ExtraTreesRegressor(n_estimators=4, random_state=0).fit(X, y)
    X.insert(0, "patient", np.arange(len(X)) * 3 + 1)
    X.to_csv(tmp_path / "rows.csv", index=False)
    engine, loaded = load_file(tmp_path / "rows.csv")
    assert_agrees(verify(model, ingest(model), engine,
                         ScoringRequest(table=loaded, keys=("patient",))))


def test_data_file_mistakes(tmp_path):
    frame = pd.DataFrame({"a": [1.0]})
    frame.to_csv(tmp_path / "rows.csv", index=False)
    with pytest.raises(UserError, match="--table applies only"):
        load_file(tmp_path / "rows.csv", table="t")
    (tmp_path / "rows.xlsx").write_bytes(b"not a workbook")
    with pytest.raises(UserError, match="cannot tell the format"):
        load_file(tmp_path / "rows.xlsx")
    with duckdb.connect(str(tmp_path / "db.duckdb")) as con:
        con.execute("CREATE TABLE t AS SELECT 1.0 AS a")
    with pytest.raises(UserError, match="name the table"):
        load_file(tmp_path / "db.duckdb")
    with pytest.raises(UserError, match="cannot read"):
        load_file(tmp_path / "db.duckdb", table="no_such_table")
    (tmp_path / "broken.parquet").write_bytes(b"PAR1 nothing else")
    with pytest.raises(UserError, match="broken.parquet"):
        load_file(tmp_path / "broken.parquet")
