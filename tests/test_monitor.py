"""Monitoring SQL: every figure the database computes against an outside reference.

Data: breast cancer Wisconsin (diagnostic), W. N. Street, W. H. Wolberg & O. L.
Mangasarian (1993), UCI Machine Learning Repository; wine, M. Forina et al., PARVUS
(1988), UCI "Wine"; diabetes, Efron, Hastie, Johnstone & Tibshirani (2004), "Least Angle
Regression" -- all as bundled with scikit-learn. Half the rows train the model and make
the reference; "today's" rows are the other half, shifted (one feature scaled, NULLs and
out-of-range values added, a few labels missing or unknown).

References: accuracy, log loss, confusion matrix, ROC AUC, MAE and RMSE from
sklearn.metrics on the same rows; PSI, missing and out-of-range shares from numpy, written
below from the definitions (not from tree2sql's code); quantiles from numpy.quantile.
Engines: DuckDB, SQLite, PostgreSQL, Spark local and ClickHouse (chdb) executed; the
other dialects rendered and parsed back by sqlglot.
"""

from __future__ import annotations

import json
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import skops.io
import sqlglot
from click.testing import CliRunner
from engine_rows import load_rows, open_engine
from sklearn import datasets, metrics
from sklearn.ensemble import RandomForestClassifier, RandomForestRegressor

from tree2sql.cli import cli
from tree2sql.dialects import load_profile
from tree2sql.engines import connect
from tree2sql.errors import UserError
from tree2sql.ingest import ingest
from tree2sql.monitor import QUANTILES, MonitorReference, build_reference
from tree2sql.monitor_report import run_monitor
from tree2sql.monitor_sql import (
    EPS,
    OUTPUT_COLUMNS,
    PSI_FLOOR,
    MonitorRequest,
    render_monitor,
)
from tree2sql.reference import predict_reference

TOL = 1e-9
LABEL = "outcome"
EXECUTED = ["duckdb", "sqlite", "postgres", "clickhouse", "spark"]
RENDERED = ["tsql", "snowflake", "bigquery", "trino", "oracle", "redshift", "mysql",
            "databricks"]


@dataclass
class Case:
    name: str
    estimator: Any
    names: list[str]
    train: np.ndarray
    today: np.ndarray  # NaN = NULL
    labels: np.ndarray  # today's outcome, NaN = missing
    train_csv: Path


def _split(X: np.ndarray, y: np.ndarray, seed: int) -> tuple[np.ndarray, ...]:
    order = np.random.default_rng(seed).permutation(len(X))
    half = len(X) // 2
    return X[order[:half]], y[order[:half]], X[order[half:]], y[order[half:]]


def _shift(X: np.ndarray, y: np.ndarray, seed: int, unknown: float | None) -> tuple:
    """Today's rows: feature 0 scaled by 1.3 and moved by a standard deviation, 10% NULL
    in feature 1, feature 2 beyond the training range in 7 rows; 4 labels missing, one
    label that is no class (classifiers)."""
    rng = np.random.default_rng(seed)
    X, y = X.astype(float).copy(), y.astype(float).copy()
    X[:, 0] = X[:, 0] * 1.3 + X[:, 0].std()
    X[rng.random(len(X)) < 0.1, 1] = np.nan
    X[:5, 2] = X[:, 2].max() * 10
    X[5:7, 2] = -abs(X[:, 2]).max() * 10 - 1
    y[[10, 11, 12, 13]] = np.nan
    if unknown is not None:
        y[14] = unknown
    return X, y


def _make_case(name: str, estimator: Any, X: np.ndarray, y: np.ndarray, names: list[str],
               folder: Path, seed: int, unknown: float | None) -> Case:
    Xtr, ytr, Xte, yte = _split(X, y, seed)
    estimator.fit(pd.DataFrame(Xtr, columns=names), ytr)
    path = folder / f"{name}_train.csv"
    pd.DataFrame(Xtr, columns=names).to_csv(path, index=False)
    today, labels = _shift(Xte, yte, seed, unknown)
    return Case(name, estimator, names, Xtr, today, labels, path)


@pytest.fixture(scope="module")
def cases(tmp_path_factory) -> dict[str, Case]:
    folder = tmp_path_factory.mktemp("monitor")
    cancer, wine, diabetes = (datasets.load_breast_cancer(), datasets.load_wine(),
                              datasets.load_diabetes())
    forest = {"n_estimators": 6, "max_depth": 4, "random_state": 0, "n_jobs": 1}
    # The ten "mean ..." features of breast cancer (names with spaces), binary target.
    return {
        "cancer": _make_case("cancer", RandomForestClassifier(**forest), cancer.data[:, :10],
                             cancer.target, list(cancer.feature_names[:10]), folder, 1, 7.0),
        "wine": _make_case("wine", RandomForestClassifier(**forest), wine.data, wine.target,
                           list(wine.feature_names), folder, 2, 9.0),
        "diabetes": _make_case("diabetes", RandomForestRegressor(**forest), diabetes.data,
                               diabetes.target, list(diabetes.feature_names), folder, 3, None),
    }


# ---- numpy reference implementations, from the definitions ------------------------------

def np_bins(x: np.ndarray, edges: list[float]) -> np.ndarray:
    """Counts for [missing, x <= e1, e1 < x <= e2, ..., x > ek]."""
    counts = [np.isnan(x).sum()]
    bounds = [-np.inf, *edges, np.inf]
    for lo, hi in zip(bounds, bounds[1:], strict=False):
        inside = (x > lo) & ((x <= hi) if hi != np.inf else np.ones_like(x, dtype=bool))
        counts.append((inside & ~np.isnan(x)).sum())
    return np.array(counts, dtype=float)


def np_psi(actual: np.ndarray, expected: np.ndarray) -> float:
    a = np.maximum(actual, PSI_FLOOR)
    e = np.maximum(expected, PSI_FLOOR)
    return float(np.sum((a - e) * np.log(a / e)))


# ---- engines --------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def engines():
    opened: dict = {}
    yield lambda d: opened[d] if d in opened else opened.setdefault(d, open_engine(d))
    for engine in opened.values():
        engine.close()


def _table(engine, case: Case) -> str:
    table = f"t2s_monitor_{case.name}_{uuid.uuid4().hex[:6]}"
    X = np.column_stack([case.today, case.labels])
    load_rows(engine, load_profile(engine.dialect), table, X, [*case.names, LABEL],
              np.isnan(X))
    return table


def _expected_scores(case: Case) -> np.ndarray:
    ref = predict_reference(case.estimator, ingest(case.estimator), case.today)
    return ref.values


def _check_drift(report, case: Case, reference: MonitorReference, scores: np.ndarray) -> None:
    n = len(case.today)
    assert report.rows == report.scored_rows == n
    by_name = {(d.kind, d.name): d for d in report.drift}
    items = [(r, case.today[:, case.names.index(r.name)]) for r in reference.items
             if r.kind == "feature"]
    items += [(r, scores[:, r.output]) for r in reference.items if r.kind == "score"]
    for ref, x in items:
        got = by_name[(ref.kind, ref.name)]
        counts = np_bins(x, ref.edges)
        assert got.psi == pytest.approx(np_psi(counts / n, [ref.missing_share, *ref.shares]),
                                        abs=TOL), ref.name
        assert got.missing_share == pytest.approx(np.isnan(x).mean(), abs=TOL)
        assert got.below_range_share == pytest.approx((x < ref.min).mean(), abs=TOL)
        assert got.above_range_share == pytest.approx((x > ref.max).mean(), abs=TOL)
    shifted = by_name[("feature", case.names[0])]
    assert shifted.psi > 0.25 and shifted.level == "alert"
    assert by_name[("feature", case.names[1])].missing_share > 0.05
    assert by_name[("feature", case.names[2])].above_range_share >= 5 / n


def _check_outcomes(report, case: Case, scores: np.ndarray) -> None:
    forest = ingest(case.estimator)
    y = case.labels
    if not forest.is_classifier:
        ok = ~np.isnan(y) & ~np.isnan(scores[:, 0])
        assert report.outcome["labelled_rows"] == ok.sum()
        assert report.outcome["mae"] == pytest.approx(
            metrics.mean_absolute_error(y[ok], scores[ok, 0]), rel=TOL)
        assert report.outcome["rmse"] == pytest.approx(
            metrics.root_mean_squared_error(y[ok], scores[ok, 0]), rel=TOL)
        return
    classes = list(forest.classes)
    known = np.isin(y, classes)
    ok = known & ~np.isnan(scores).any(axis=1)
    assert report.outcome["unknown_labels"] == (~np.isnan(y) & ~known).sum() == 1
    assert report.outcome["labelled_rows"] == ok.sum()
    proba, truth = scores[ok], y[ok].astype(int)
    predicted = np.array(classes)[np.argmax(proba, axis=1)]  # first max: the library's rule
    assert report.outcome["accuracy"] == pytest.approx(
        metrics.accuracy_score(truth, predicted), abs=TOL)
    assert report.outcome["log_loss"] == pytest.approx(
        metrics.log_loss(truth, proba, labels=classes), rel=TOL)
    matrix = metrics.confusion_matrix(truth, predicted, labels=classes)
    got = [[report.confusion[str(t)][str(p)] for p in classes] for t in classes]
    assert got == matrix.tolist()
    if len(classes) == 2:
        assert report.outcome["roc_auc"] == pytest.approx(
            metrics.roc_auc_score(truth, proba[:, 1]), abs=TOL)
    else:
        assert report.outcome["roc_auc"] == pytest.approx(
            metrics.roc_auc_score(truth, proba, multi_class="ovr", average="macro"), abs=TOL)
        for k, c in enumerate(classes):
            assert report.outcome["roc_auc_per_class"][str(c)] == pytest.approx(
                metrics.roc_auc_score(truth == c, proba[:, k]), abs=TOL)
    # ties were present, so the average-rank rule was exercised
    assert len(np.unique(proba[:, -1])) < len(proba)


# ---- the reference --------------------------------------------------------------------------

def test_reference_bins_at_training_deciles(cases):
    case = cases["cancer"]
    forest = ingest(case.estimator)
    reference = build_reference(case.estimator, forest, case.train_csv, {})
    assert reference.rows == len(case.train) and reference.fingerprint == forest.fingerprint()
    for item in (r for r in reference.items if r.kind == "feature"):
        x = case.train[:, case.names.index(item.name)]
        assert item.edges == np.unique(np.quantile(x, QUANTILES,
                                                   method="inverted_cdf")).tolist()
        counts = np_bins(x, item.edges)
        assert [item.missing_share, *item.shares] == pytest.approx(counts / len(x), abs=0)
        assert (item.min, item.max) == (x.min(), x.max())
    [score] = [r for r in reference.items if r.kind == "score"]
    assert (score.name, score.output) == ("prob_1", 1)  # the positive (second) class
    p1 = case.estimator.predict_proba(pd.DataFrame(case.train, columns=case.names))[:, 1]
    assert [score.missing_share, *score.shares] == pytest.approx(
        np_bins(p1, score.edges) / len(p1), abs=0)
    again = MonitorReference.from_json(json.loads(json.dumps(reference.to_json())), "copy")
    assert again == reference  # JSON keeps every double (shortest repr round-trips)


# ---- executed engines ----------------------------------------------------------------------

@pytest.mark.parametrize("dialect", EXECUTED)
@pytest.mark.parametrize("name", ["cancer", "wine", "diabetes"])
def test_figures_match_sklearn_and_numpy(engines, cases, dialect, name):
    case = cases[name]
    engine = engines(dialect)
    forest = ingest(case.estimator)
    reference = build_reference(case.estimator, forest, case.train_csv, {})
    table = _table(engine, case)
    query = render_monitor(forest, reference, MonitorRequest(table=table, label=LABEL),
                           engine.dialect)
    report = run_monitor(engine, query)
    scores = _expected_scores(case)
    _check_drift(report, case, reference, scores)
    _check_outcomes(report, case, scores)
    assert report.alerts


@pytest.mark.parametrize("dialect", ["duckdb", "sqlite", "postgres", "clickhouse"])
def test_scores_read_from_a_table_joined_on_keys(engines, cases, dialect):
    """Scores stored beside the rows (a deployed table): same figures as computed inline."""
    case = cases["cancer"]
    engine = engines(dialect)
    p = load_profile(engine.dialect)
    forest = ingest(case.estimator)
    reference = build_reference(case.estimator, forest, case.train_csv, {})
    table = _table(engine, case)
    scored = f"{table}_scores"
    from tree2sql.compiler import ScoringRequest, compile_forest

    compiled = compile_forest(forest, ScoringRequest(table=table, keys=("row_id",)), p)
    for statement in compiled.setup:
        engine.execute(statement)
    engine.execute(p.render_ddl("table", name=p.quote(scored), query=compiled.sql))
    joined = run_monitor(engine, render_monitor(forest, reference, MonitorRequest(
        table=table, scores=scored, keys=("row_id",), label=LABEL), engine.dialect))
    inline = run_monitor(engine, render_monitor(forest, reference, MonitorRequest(
        table=table, label=LABEL), engine.dialect))
    assert joined.outcome == pytest.approx(inline.outcome, abs=TOL)
    psi = {d.name: d.psi for d in inline.drift}
    assert {d.name: d.psi for d in joined.drift} == pytest.approx(psi, abs=TOL)
    _check_outcomes(joined, case, _expected_scores(case))


# ---- rendered dialects ---------------------------------------------------------------------

@pytest.mark.parametrize("dialect", RENDERED)
def test_renders_and_parses_for_other_dialects(cases, dialect):
    case = cases["wine"]
    forest = ingest(case.estimator)
    reference = build_reference(case.estimator, forest, case.train_csv, {})
    scores = "wine_scores" if dialect == "tsql" else None
    query = render_monitor(forest, reference, MonitorRequest(
        table="wine_today", scores=scores, keys=("id",), label=LABEL), dialect)
    [parsed] = sqlglot.parse(query.sql, read=load_profile(dialect).sqlglot_dialect)
    assert parsed.named_selects == list(OUTPUT_COLUMNS)
    assert {c.alias for c in parsed.ctes} >= {"__t2s_m_in", "__t2s_m_sc", "__t2s_m_numbers"}
    text = query.sql
    assert load_profile(dialect).quote("color_intensity") in text
    assert load_profile(dialect).double(1.0 - EPS) in text  # the log-loss clip
    if dialect == "tsql":
        assert "LOG(" in text and "LN(" not in text  # SQL Server's natural logarithm
        with pytest.raises(UserError, match="cannot nest"):
            render_monitor(forest, reference, MonitorRequest(table="t"), dialect)


# ---- the command line ----------------------------------------------------------------------

def _invoke(*args: Any):
    return CliRunner().invoke(cli, [str(a) for a in args])


@pytest.fixture(scope="module")
def saved(cases, tmp_path_factory) -> tuple[Path, Case]:
    case = cases["cancer"]
    path = tmp_path_factory.mktemp("model") / "cancer.skops"
    skops.io.dump(case.estimator, path)
    return path, case


def _csv(case: Case, X: np.ndarray, labels: np.ndarray, path: Path) -> Path:
    frame = pd.DataFrame(X, columns=case.names)
    frame[LABEL] = pd.array([None if np.isnan(v) else int(v) for v in labels], dtype="Int64")
    frame.insert(0, "id", range(len(frame)))
    frame.to_csv(path, index=False)
    return path


def test_cli_exit_codes_and_report(saved, tmp_path):
    model, case = saved
    ref = tmp_path / "ref.json"
    made = _invoke("monitor", model, "--reference-data", case.train_csv, "--save-reference", ref)
    assert made.exit_code == 0, made.output
    today = _csv(case, case.today, case.labels, tmp_path / "today.csv")
    shifted = _invoke("monitor", model, "--reference-data", ref, "--data", today, "--label",
                      LABEL, "--report", tmp_path / "r.json")
    assert shifted.exit_code == 1, shifted.output
    assert "ALERT" in shifted.output and case.names[0] in shifted.output
    assert "confusion matrix" in shifted.output
    saved_report = json.loads((tmp_path / "r.json").read_text())
    assert saved_report["alerting"] is True and saved_report["outcome"]["accuracy"] > 0.5
    same = _csv(case, case.train, np.zeros(len(case.train)), tmp_path / "same.csv")
    calm = _invoke("monitor", model, "--reference-data", ref, "--data", same)
    assert calm.exit_code == 0, calm.output
    assert "no PSI at or above 0.25" in calm.output
    sql = _invoke("monitor", model, "--reference-data", ref, "--table", "shipments",
                  "--dialect", "snowflake")
    assert sql.exit_code == 0 and sql.output.rstrip().endswith(";")
    sqlglot.parse(sql.output, read="snowflake")


def test_cli_bad_input_exits_2(saved, cases, tmp_path):
    model, case = saved
    other = tmp_path / "wine.skops"
    skops.io.dump(cases["wine"].estimator, other)
    ref = tmp_path / "ref.json"
    assert _invoke("monitor", model, "--reference-data", case.train_csv,
                   "--save-reference", ref).exit_code == 0
    tampered = tmp_path / "tampered.json"
    data = json.loads(ref.read_text())
    data["items"][0]["edges"][0] = "1) OR (1"  # numbers become SQL literals: refused
    tampered.write_text(json.dumps(data))
    for args, words in [
        ((other, "--reference-data", ref, "--table", "t"), "another model"),
        ((model, "--table", "t"), "training reference"),
        ((model, "--reference-data", tmp_path / "missing.json", "--table", "t"),
         "does not exist"),
        ((model, "--reference-data", case.train_csv, "--name", "x"), "needs --url"),
        ((model, "--reference-data", ref, "--table", "t", "--scores", "s"), "--key"),
        ((model, "--reference-data", ref, "--table", "t", "--dialect", "nosuch"),
         "unknown dialect"),
        ((model, "--reference-data", tampered, "--table", "t"), "damaged"),
    ]:
        result = _invoke("monitor", *args)
        assert result.exit_code == 2, (args, result.output)
        assert words in result.output and "fix:" in result.output


@pytest.fixture(params=["duckdb", "sqlite", "postgres"])
def database(request, tmp_path):
    """A URL of a fresh database (PostgreSQL: a fresh schema) and a raw runner for it."""
    if request.param != "postgres":
        url = (f"duckdb:///{tmp_path / 'm.duckdb'}" if request.param == "duckdb"
               else f"sqlite:///{tmp_path / 'm.db'}")
        yield url
        return
    import sqlalchemy as sa

    base = request.getfixturevalue("pg_url")
    schema = f"t2s_monitor_{uuid.uuid4().hex[:10]}"
    engine = sa.create_engine(base)
    with engine.begin() as conn:
        conn.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    try:
        yield f"{base}?options=-csearch_path%3D{schema}"
    finally:
        with engine.begin() as conn:
            conn.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
        engine.dispose()


def _run(url: str, sql: str) -> None:
    engine = connect(url)
    try:
        engine.execute(sql)
    finally:
        engine.close()


def test_deploy_keeps_the_reference_and_upgrades_old_manifests(saved, database, tmp_path):
    model, case = saved
    engine = connect(database)
    try:
        X = np.column_stack([case.today, case.labels])
        load_rows(engine, load_profile(engine.dialect), "today", X, [*case.names, LABEL],
                  np.isnan(X))
    finally:
        engine.close()
    deploy = ("deploy", model, "--url", database, "--source", "today", "--key", "row_id",
              "--as", "table", "--name", "risk", "--sample", 0)
    assert _invoke(*deploy).exit_code == 0
    # A manifest from before the reference column: deploys, status and monitor still work.
    _run(database, 'ALTER TABLE tree2sql_deployments DROP COLUMN "reference"')
    status = _invoke("status", "--url", database)
    assert status.exit_code == 0 and "risk" in status.output, status.output
    without = _invoke("monitor", model, "--url", database, "--name", "risk")
    assert without.exit_code == 2 and "without a monitoring reference" in without.output
    redeploy = _invoke(*deploy, "--reference-data", case.train_csv)
    assert redeploy.exit_code == 0, redeploy.output
    rows = json.loads(_invoke("status", "--url", database, "--all", "--json").output)
    assert [r["reference"] is None for r in rows] == [True, False]
    result = _invoke("monitor", model, "--url", database, "--name", "risk", "--label", LABEL,
                     "--report", tmp_path / "r.json")
    assert result.exit_code == 1, result.output  # feature 0 was shifted
    report = json.loads((tmp_path / "r.json").read_text())
    scores = _expected_scores(case)
    ok = np.isin(case.labels, [0, 1]) & ~np.isnan(scores).any(axis=1)
    assert report["outcome"]["roc_auc"] == pytest.approx(
        metrics.roc_auc_score(case.labels[ok].astype(int), scores[ok, 1]), abs=TOL)


def test_text_inputs_of_a_pipeline_report_their_missing_share(tmp_path):
    """A pipeline's text column: no bins (categories are not binned yet), its NULL share."""
    from sklearn.compose import ColumnTransformer
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import OneHotEncoder

    rng = np.random.default_rng(5)
    frame = pd.DataFrame({"hours": rng.normal(30, 5, 200),
                          "tier": rng.choice(np.array(["a", "b", None], dtype=object), 200)})
    pipe = make_pipeline(ColumnTransformer([("tier", OneHotEncoder(handle_unknown="ignore"),
                                             ["tier"])], remainder="passthrough"),
                         RandomForestClassifier(n_estimators=3, max_depth=3, random_state=0))
    pipe.fit(frame, (frame.hours > 30).astype(int))
    frame.to_csv(tmp_path / "train.csv", index=False)
    forest = ingest(pipe)
    reference = build_reference(pipe, forest, tmp_path / "train.csv", {})
    engine = connect(None)
    try:
        engine.execute(f"CREATE TABLE today AS SELECT * FROM read_csv('{tmp_path / 'train.csv'}')")
        engine.execute("UPDATE today SET tier = NULL WHERE hours > 33")
        tier = frame.tier.to_numpy(dtype=object)
        expected = np.mean([pd.isna(v) or h > 33 for v, h in zip(tier, frame.hours, strict=True)])
        report = run_monitor(engine, render_monitor(forest, reference,
                                                    MonitorRequest(table="today")))
    finally:
        engine.close()
    [text] = [d for d in report.drift if d.name == "tier"]
    assert text.psi is None and text.level == "n/a"
    assert text.missing_share == pytest.approx(expected, abs=TOL)
    assert [d.psi for d in report.drift if d.name == "hours"] == [0.0]
