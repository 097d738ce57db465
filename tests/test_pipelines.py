"""Pipelines (ColumnTransformer, encoders, imputers, scalers) compiled to SQL over the raw
columns agree with scikit-learn's own pipeline predictions, row for row.

The reference is the fitted pipeline itself, predicting on the raw rows read back from the
database (strings as strings, NULL as the gap the pipeline learned). Bar (DESIGN.md): no
disagreement, |diff| <= 1e-12 (relative to max(1, |value|) for regression and after a
link). Rows include unseen and infrequent categories, hostile category strings, NULL and
NaN gaps, infinities, and rows straddling each scaled split's float32 bound by a few IEEE
754 doubles (numpy.nextafter), where folding a threshold through (x - mean) / scale would
not be exact.
"""

from __future__ import annotations

import sqlite3

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
import skops.io
from click.testing import CliRunner
from sklearn.compose import ColumnTransformer
from sklearn.datasets import load_diabetes, load_wine
from sklearn.decomposition import PCA
from sklearn.ensemble import (
    ExtraTreesRegressor,
    GradientBoostingClassifier,
    GradientBoostingRegressor,
    HistGradientBoostingClassifier,
    RandomForestClassifier,
)
from sklearn.impute import SimpleImputer
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import (
    FunctionTransformer,
    MinMaxScaler,
    OneHotEncoder,
    OrdinalEncoder,
    RobustScaler,
    StandardScaler,
)
from sklearn.tree import DecisionTreeClassifier

from tests.helpers import STRATEGIES
from tree2sql.cli import cli
from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.engines import DuckDBEngine, connect
from tree2sql.errors import UserError
from tree2sql.exact import bounds
from tree2sql.forest import LEAF, Forest
from tree2sql.ingest import ingest
from tree2sql.inputs import Arith, Clip, raw_column
from tree2sql.loading import load_model
from tree2sql.verify import Report, verify

KEY = "row_id"
HOSTILE = ["foam box", "it's \"quoted\"", "ünïcødé ❄ 冷", "x'); DROP TABLE t; --", "",
           "back\\slash"]
TEMP = 'ambient "temp" °C'  # a hostile column name, quoted through the dialect
RARE = ["tier-9", "tier-8"]  # below min_frequency: grouped as infrequent
UNSEEN = ["never seen", "FOAM BOX", " foam box", "tier-0"]  # case and space variants too


def shipments(n: int, seed: int) -> tuple[pd.DataFrame, np.ndarray]:
    """Invented cold-chain shipments (DESIGN.md scenario), fixed seed, with gaps.

    `packaging` is trained with None for its gaps (object dtype), `carrier` with NaN (what
    pandas holds for a gap in a string column); numeric gaps are NaN.
    """
    rng = np.random.default_rng(seed)
    packaging = rng.choice(np.array(HOSTILE + [None], dtype=object), n)
    carrier = rng.choice(np.array(["tier-1", "tier-2", "tier-3", *RARE], dtype=object), n,
                         p=[0.45, 0.3, 0.21, 0.02, 0.02])
    carrier[rng.random(n) < 0.08] = np.nan
    frame = pd.DataFrame({
        "packaging": pd.Series(packaging, dtype=object),
        "carrier": pd.Series(carrier, dtype=object),
        "transit_hours": rng.gamma(4.0, 9.0, n),
        TEMP: rng.normal(18.0, 7.0, n),
        "door_openings": rng.integers(0, 4, n).astype(np.float64),
        "battery": rng.uniform(0.0, 100.0, n),
    })
    for column in ("transit_hours", "battery"):
        frame.loc[rng.random(n) < 0.1, column] = np.nan
    risk = (frame["transit_hours"].fillna(40) / 30 + (frame[TEMP] - 18) / 6
            + (frame["packaging"] == "foam box") * 1.5 - (frame["carrier"] == "tier-1")
            + frame["door_openings"] * 0.4 + rng.normal(0, 0.7, n))
    return frame, np.digitize(risk, [1.5, 3.0])  # three classes


def table_rows(frame: pd.DataFrame, seed: int) -> tuple[pd.DataFrame, np.ndarray]:
    """Training-like rows plus unseen categories, infinities and a NULL/NaN mix.

    Returns the rows and a mask of numeric cells to store as SQL NULL (the other NaN cells
    stay IEEE NaN in the table; both are missing to the SQL and to the pipeline).
    """
    rng = np.random.default_rng(seed)
    rows = frame.sample(n=min(len(frame), 300), random_state=seed).reset_index(drop=True)
    extra = rows.iloc[:12].copy().reset_index(drop=True)
    for i, value in enumerate(UNSEEN):
        extra.loc[i, "packaging"] = value
        extra.loc[i + 4, "carrier"] = value
    extra.loc[8, "transit_hours"] = np.inf
    extra.loc[9, TEMP] = -np.inf
    extra.loc[10, "door_openings"] = 7.0  # an unseen numeric category
    extra.loc[11, ["packaging", "carrier"]] = None
    rows = pd.concat([rows, extra], ignore_index=True)
    null = np.zeros((len(rows), rows.shape[1]), dtype=bool)
    for j, column in enumerate(rows.columns):
        if rows[column].dtype != object:
            null[:, j] = rows[column].isna().to_numpy() & (rng.random(len(rows)) < 0.5)
    return rows, null


def load_table(engine: DuckDBEngine, rows: pd.DataFrame, null: np.ndarray | None = None,
               table: str = "t") -> None:
    """Rows into DuckDB through Arrow, which keeps IEEE NaN apart from SQL NULL: text
    columns as VARCHAR (None -> NULL), numbers as DOUBLE with NULL where `null` says."""
    columns = {KEY: pa.array(np.arange(len(rows), dtype=np.int64))}
    for j, name in enumerate(rows.columns):
        values = rows[name]
        if values.dtype == object:
            columns[name] = pa.array([None if v is None or v != v else str(v) for v in values],
                                     type=pa.string())
        else:
            mask = None if null is None else null[:, j]
            columns[name] = pa.array(values.to_numpy(np.float64), mask=mask)
    engine.con.register("__rows", pa.table(columns))
    engine.execute(f'CREATE TABLE "{table}" AS SELECT * FROM __rows')
    engine.con.unregister("__rows")


def score(pipeline, rows: pd.DataFrame, strategy: str, null: np.ndarray | None = None,
          forest: Forest | None = None) -> Report:
    engine = DuckDBEngine()
    try:
        load_table(engine, rows, null)
        report = verify(pipeline, forest or ingest(pipeline), engine,
                        ScoringRequest(table="t", keys=(KEY,), strategy=strategy))
    finally:
        engine.close()
    assert report.rows == len(rows)
    return report


def assert_agrees(report: Report, scale: float = 1.0) -> None:
    assert report.disagreements == 0, report.to_text()
    assert report.label_disagreements == 0, report.to_text()
    assert report.max_abs_diff <= 1e-12 * scale, report.to_text()


def edge_rows(pipeline, forest: Forest, base: pd.DataFrame, per_feature: int = 6,
              steps: int = 6) -> pd.DataFrame:
    """Rows whose raw value lands, after the library's own scaling, on each side of a
    split's SQL bound: x0 from the affine map the pipeline computes (measured at two points
    by its own transform), then x0 +- a few doubles (numpy.nextafter)."""
    inputs, transform = forest.inputs, pipeline[:-1].transform
    targets: dict[int, list[float]] = {}
    for tree in forest.trees:
        inner = np.flatnonzero(tree.left != LEAF)
        b = bounds(tree.threshold[inner], forest.comparison)
        for node, bound in zip(inner, b, strict=True):
            j = int(tree.feature[node])
            if j < forest.n_features and scaled_column(inputs.features[j]) is not None \
                    and np.isfinite(bound) and len(targets.setdefault(j, [])) < per_feature:
                targets[j] += [float(bound), float(tree.threshold[node])]
    rows = []
    template = base.iloc[[0]].reset_index(drop=True)
    for j, values in targets.items():
        column = inputs.columns[scaled_column(inputs.features[j])]
        probe = pd.concat([template] * 2, ignore_index=True)
        probe[column] = [0.0, 1.0]
        out = transform(probe)
        at0, at1 = (out.toarray() if hasattr(out, "toarray") else out)[:, j]
        for target in values:
            x = (target - at0) / (at1 - at0)
            for _ in range(steps):
                x = np.nextafter(x, -np.inf)
            for _ in range(2 * steps + 1):
                row = template.copy()
                row[column] = x
                rows.append(row)
                x = np.nextafter(x, np.inf)
    return pd.concat(rows, ignore_index=True) if rows else base.iloc[:0]


def scaled_column(expr) -> int | None:
    """The raw column behind a chain of arithmetic (scalers, weights), else None."""
    if not isinstance(expr, Arith):
        return None
    while isinstance(expr, Arith | Clip):
        expr = expr.arg
    return raw_column(expr)


def pipeline_a():
    """One-hot (ignore unseen; infrequent groups), imputed+standardised, clipped min-max,
    passthrough remainder with gaps, into a random forest."""
    ct = ColumnTransformer([
        ("pack", OneHotEncoder(handle_unknown="ignore"), ["packaging"]),
        ("carrier", OneHotEncoder(handle_unknown="infrequent_if_exist", min_frequency=20),
         ["carrier"]),
        ("hours", make_pipeline(SimpleImputer(), StandardScaler()), ["transit_hours"]),
        ("temp", MinMaxScaler(clip=True), [TEMP]),
    ], remainder="passthrough")
    return make_pipeline(ct, RandomForestClassifier(n_estimators=12, max_depth=7,
                                                    random_state=0))


def pipeline_b():
    """Ordinal codes with unknown/missing codes, median imputation with indicators, robust
    scaling, a dropped column and transformer weights, into extra-trees regression."""
    ct = ColumnTransformer([
        ("codes", OrdinalEncoder(handle_unknown="use_encoded_value", unknown_value=-1,
                                 encoded_missing_value=-2), ["packaging", "carrier"]),
        ("nums", make_pipeline(SimpleImputer(strategy="median", add_indicator=True),
                               RobustScaler()), ["transit_hours", "battery", TEMP]),
        ("drop_me", "drop", ["door_openings"]),
    ], transformer_weights={"codes": 1.0, "nums": 0.7})
    return make_pipeline(ct, ExtraTreesRegressor(n_estimators=8, max_depth=8, random_state=0))


def pipeline_c():
    """Unseen categories refused (handle_unknown='error'), drop='if_binary' / 'first'."""
    ct = ColumnTransformer([
        ("pack", OneHotEncoder(drop="first"), ["packaging"]),
        ("carrier", make_pipeline(SimpleImputer(strategy="constant", fill_value="no carrier"),
                                  OneHotEncoder(drop="if_binary")), ["carrier"]),
    ], remainder=SimpleImputer(strategy="most_frequent"))
    return make_pipeline(ct, DecisionTreeClassifier(max_depth=8, random_state=0))


def pipeline_d():
    """Ordinal codes (NaN for unknown and missing, at most 4 categories) read by histogram
    boosting's native categorical splits."""
    ct = ColumnTransformer([
        ("codes", OrdinalEncoder(handle_unknown="use_encoded_value", unknown_value=np.nan,
                                 max_categories=4), ["packaging", "carrier"]),
        ("temp", StandardScaler(), [TEMP]),
    ], remainder="passthrough")
    return make_pipeline(ct, HistGradientBoostingClassifier(max_iter=10, max_depth=4,
                                                            categorical_features=[0, 1],
                                                            random_state=0))


def pipeline_e():
    """Numeric categories one-hot encoded, a sparse ColumnTransformer output, then a
    standard scaler on the sparse matrix (the library multiplies by 1 / scale there),
    into multiclass gradient boosting (softmax)."""
    ct = ColumnTransformer([
        ("doors", OneHotEncoder(handle_unknown="ignore"), ["door_openings"]),
        ("pack", OneHotEncoder(handle_unknown="ignore", max_categories=4), ["packaging"]),
        ("nums", SimpleImputer(strategy="mean"), ["transit_hours", TEMP]),
    ], sparse_threshold=1.0)
    return make_pipeline(ct, StandardScaler(with_mean=False),
                         GradientBoostingClassifier(n_estimators=8, max_depth=3,
                                                    random_state=0))


PIPELINES = {"a": pipeline_a, "b": pipeline_b, "c": pipeline_c, "d": pipeline_d,
             "e": pipeline_e}


@pytest.fixture(scope="module")
def fitted():
    frame, label = shipments(900, seed=1)
    target = {"b": frame["transit_hours"].fillna(30).to_numpy() * 0.1 + label}
    models = {name: build().fit(frame, target.get(name, label))
              for name, build in PIPELINES.items()}
    rows, null = table_rows(frame, seed=2)
    return frame, models, rows, null


@pytest.mark.parametrize("strategy", STRATEGIES)
@pytest.mark.parametrize("name", sorted(PIPELINES))
def test_synthetic_pipelines_agree(fitted, name, strategy):
    frame, models, rows, null = fitted
    pipeline = models[name]
    forest = ingest(pipeline)
    edges = edge_rows(pipeline, forest, frame)
    table = pd.concat([rows, edges], ignore_index=True)
    null = np.vstack([null, np.zeros((len(edges), null.shape[1]), dtype=bool)])
    report = score(pipeline, table, strategy, null, forest)
    scale = 1.0 if forest.is_classifier else 10.0  # regression: relative to |value| <= 10
    assert_agrees(report, scale)
    assert report.null_refused >= 1  # the infinite rows at least: the library refuses them


def test_unknown_categories_refused_when_the_encoder_raises(fitted):
    frame, models, rows, null = fitted
    report = score(models["c"], rows, "nested_case", null)
    assert_agrees(report)
    # packaging: 4 unseen values (its NULL gap was seen in fit as None); the two NULL-
    # carrier rows are imputed; pipeline c's numeric remainder is imputed too.
    assert report.null_refused >= 4 and report.null_scores == report.null_refused


def test_categories_and_gaps_become_sql_over_raw_columns(fitted):
    _, models, _, _ = fitted
    forest = ingest(models["a"])
    assert forest.inputs.columns[:2] == ("packaging", "carrier")
    assert forest.inputs.text[:2] == (True, True)
    # The pipeline learned None as packaging's gap, NaN as carrier's.
    assert forest.inputs.null_as_none[:2] == (True, False)
    sql = compile_forest(forest, ScoringRequest(table="t", keys=(KEY,)), "duckdb").sql
    assert "'it''s \"quoted\"'" in sql  # quoted as a string literal, not spliced
    assert "'ünïcødé ❄ 冷'" in sql
    assert 'CAST("packaging"' not in sql  # text columns are never cast to double
    assert "COALESCE(" in sql
    assert forest.feature_names[0].startswith("pack__packaging_")
    carrier = models["a"][0].named_transformers_["carrier"]
    assert set(carrier.infrequent_categories_[0]) == set(RARE)  # the grouping is exercised


def test_hostile_categories_in_sqlite(fitted, tmp_path):
    """Same pipeline, another engine (stdlib SQLite, its own string and double rules)."""
    frame, models, rows, _ = fitted
    pipeline = models["a"]
    path = tmp_path / "rows.sqlite"
    with sqlite3.connect(path) as con:
        rows.insert(0, KEY, np.arange(len(rows)))
        clean = rows.replace([np.inf, -np.inf], np.nan)  # SQLite stores no NaN; inf kept out
        clean.to_sql("t", con, index=False)
    engine = connect(f"sqlite:///{path}")
    try:
        report = verify(pipeline, ingest(pipeline), engine,
                        ScoringRequest(table="t", keys=(KEY,), strategy="nested_case"))
    finally:
        engine.close()
    assert_agrees(report)
    assert report.rows == len(rows)


def test_wine_imputed_and_scaled(monkeypatch):
    """wine: Forina et al., UCI ML repository (bundled with scikit-learn); 10% of cells
    blanked, median imputation then standard scaling, plus rows on scaled split bounds."""
    X, y = load_wine(return_X_y=True, as_frame=True)
    rng = np.random.default_rng(3)
    X = X.mask(rng.random(X.shape) < 0.1)
    pipeline = make_pipeline(SimpleImputer(strategy="median"), StandardScaler(),
                             RandomForestClassifier(n_estimators=15, random_state=0))
    pipeline.fit(X, y)
    forest = ingest(pipeline)
    rows = pd.concat([X, edge_rows(pipeline, forest, X.fillna(X.median()))],
                     ignore_index=True)
    for strategy in STRATEGIES:
        assert_agrees(score(pipeline, rows, strategy, forest=forest))


def test_diabetes_scalers_into_boosting():
    """diabetes: Efron, Hastie, Johnstone & Tibshirani (2004), 'Least Angle Regression'
    (bundled with scikit-learn); robust and min-max scaling by column group."""
    X, y = load_diabetes(return_X_y=True, as_frame=True)
    ct = ColumnTransformer([("robust", RobustScaler(), ["age", "bmi", "bp"]),
                            ("minmax", MinMaxScaler(), ["s1", "s2", "s3", "s4", "s5", "s6"])],
                           remainder="passthrough")
    pipeline = make_pipeline(ct, GradientBoostingRegressor(n_estimators=20, max_depth=3,
                                                           random_state=0)).fit(X, y)
    forest = ingest(pipeline)
    rows = pd.concat([X, edge_rows(pipeline, forest, X)], ignore_index=True)
    for strategy in STRATEGIES:
        assert_agrees(score(pipeline, rows, strategy, forest=forest), scale=400.0)


def test_pipeline_fit_on_an_array_reads_positional_columns():
    X, y = load_wine(return_X_y=True)  # wine: Forina et al., UCI ML repository
    pipeline = make_pipeline(MinMaxScaler(), RandomForestClassifier(n_estimators=5,
                                                                    random_state=0))
    pipeline.fit(X, y)
    forest = ingest(pipeline)
    assert forest.input_names == tuple(f"x{i}" for i in range(X.shape[1]))
    assert_agrees(score(pipeline, pd.DataFrame(X, columns=list(forest.input_names)),
                        "nested_case", forest=forest))


@pytest.mark.parametrize("step, words", [
    (PCA(n_components=2), ["'pca'", "PCA"]),
    (FunctionTransformer(np.log1p), ["'functiontransformer'", "FunctionTransformer"]),
])
def test_unsupported_step_is_named(step, words):
    X, y = load_wine(return_X_y=True, as_frame=True)  # wine: Forina et al., UCI
    pipeline = make_pipeline(step, RandomForestClassifier(n_estimators=2, random_state=0))
    with pytest.raises(UserError) as caught:
        ingest(pipeline.fit(X, y))
    message = str(caught.value)
    assert all(w in message for w in words), message
    assert "StandardScaler" in caught.value.fix  # what is supported


def test_unsupported_step_inside_column_transformer_is_named():
    X, y = load_wine(return_X_y=True, as_frame=True)  # wine: Forina et al., UCI
    ct = ColumnTransformer([("squash", PCA(n_components=1), ["alcohol", "ash"])],
                           remainder="passthrough")
    pipeline = make_pipeline(ct, RandomForestClassifier(n_estimators=2, random_state=0))
    with pytest.raises(UserError, match="columntransformer > squash"):
        ingest(pipeline.fit(X, y))


def test_none_and_nan_as_two_categories_is_refused():
    X = pd.DataFrame({"packaging": pd.Series(["foam box", None, np.nan, "crate"] * 5,
                                             dtype=object)})
    pipeline = make_pipeline(OneHotEncoder(), DecisionTreeClassifier(random_state=0))
    with pytest.raises(UserError, match="None and NaN"):
        ingest(pipeline.fit(X, np.arange(20) % 2))


def test_text_column_typed_as_number_is_refused(fitted):
    frame, models, rows, _ = fitted
    numeric = rows.copy()
    numeric["carrier"] = 1.0
    engine = DuckDBEngine()
    try:
        load_table(engine, numeric)
        with pytest.raises(UserError, match="must hold text"):
            verify(models["a"], ingest(models["a"]), engine,
                   ScoringRequest(table="t", keys=(KEY,)))
    finally:
        engine.close()


def test_cli_verifies_a_saved_pipeline_and_names_unsupported_steps(fitted, tmp_path):
    frame, models, rows, _ = fitted
    skops.io.dump(models["b"], tmp_path / "pipeline.skops")
    assert isinstance(load_model(tmp_path / "pipeline.skops"), type(models["b"]))
    data = rows.replace([np.inf, -np.inf], np.nan)
    data.insert(0, "id", np.arange(len(data)))
    data.to_parquet(tmp_path / "rows.parquet")
    result = CliRunner().invoke(cli, ["verify", str(tmp_path / "pipeline.skops"), "--data",
                                      str(tmp_path / "rows.parquet"), "--key", "id"])
    assert result.exit_code == 0, result.output
    assert f"AGREE: {len(data)} rows checked, 0 disagreements" in result.output
    database = tmp_path / "warehouse.duckdb"
    engine = DuckDBEngine(str(database))
    load_table(engine, rows.replace([np.inf, -np.inf], np.nan), table="shipments")
    engine.close()
    result = CliRunner().invoke(cli, ["deploy", str(tmp_path / "pipeline.skops"), "--url",
                                      f"duckdb:///{database}", "--source", "shipments",
                                      "--key", KEY, "--as", "view", "--name", "risk"])
    assert result.exit_code == 0, result.output
    engine = DuckDBEngine(str(database))
    try:
        assert len(engine.query('SELECT * FROM "risk"')[KEY]) == len(rows)
    finally:
        engine.close()
    X, y = load_wine(return_X_y=True, as_frame=True)  # wine: Forina et al., UCI
    bad = make_pipeline(PCA(n_components=2), RandomForestClassifier(n_estimators=2)).fit(X, y)
    skops.io.dump(bad, tmp_path / "pca.skops")
    result = CliRunner().invoke(cli, ["compile", str(tmp_path / "pca.skops"), "--table", "t",
                                      "--key", "id"])
    assert result.exit_code == 2, result.output
    assert "'pca'" in result.output and "PCA" in result.output
