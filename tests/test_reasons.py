"""Reason codes (`--reasons K`) on real engines: DuckDB (embedded), SQLite (stdlib sqlite3
through SQLAlchemy) and PostgreSQL (server on loopback, see .ci/services.sh).

The reference is computed here, row by row, from scikit-learn's own `decision_path` and
`tree_.value` (path attribution, Saabas 2014: each step down the path credits the change
in node value to the split's feature; the forest averages over its trees). It shares no
code with tree2sql's contribution arrays or its verifier.
"""

from __future__ import annotations

import functools
import os
import tempfile
from typing import Any

import numpy as np
import pandas as pd
import pytest
import skops.io
import sqlglot
from click.testing import CliRunner
from engine_rows import KEY, Case, cases, edge_rows, load_rows, open_engine
from sklearn import datasets
from sklearn.ensemble import (
    ExtraTreesRegressor,
    GradientBoostingClassifier,
    RandomForestClassifier,
)
from sklearn.tree import DecisionTreeRegressor

from tree2sql.cli import cli
from tree2sql.compiler import Combine, CompiledQuery, ScoringRequest, compile_forest
from tree2sql.dialects import available, load_profile
from tree2sql.engines import Engine, connect
from tree2sql.errors import UserError
from tree2sql.ingest import ingest
from tree2sql.reasons_check import check_reason_columns
from tree2sql.reference import predict_reference
from tree2sql.verify import ScoredRows, fetch_scored_rows, verify

DIALECTS = ["duckdb", "sqlite", "postgres"]
TOLERANCE = 1e-12
HOSTILE = ["it's", 'say "hi"', "select", "naïve; DROP TABLE x; --"]


@pytest.fixture(scope="module")
def engines(request):
    """One engine per dialect for the module."""
    opened: dict[str, Engine] = {}

    def get(dialect: str) -> Engine:
        if dialect not in opened:
            if dialect == "duckdb":
                opened[dialect] = connect(None)
            elif dialect == "sqlite":
                opened[dialect] = connect("sqlite:///" + os.path.join(tempfile.mkdtemp(),
                                                                      "reasons.db"))
            else:
                opened[dialect] = connect(request.getfixturevalue("pg_url"))
        return opened[dialect]

    yield get
    for engine in opened.values():
        engine.close()


@functools.cache
def many_trees() -> Case:
    """110 shallow trees: the sums run through more than one staged CTE.

    diabetes: Efron, Hastie, Johnstone & Tibshirani (2004), "Least Angle Regression".
    """
    X, y = datasets.load_diabetes(return_X_y=True)
    model = ExtraTreesRegressor(n_estimators=110, max_depth=3, random_state=5).fit(X, y)
    rows = np.vstack([X[:120], edge_rows(X)])
    return Case("diabetes_110_trees", model, ingest(model), rows, np.zeros(rows.shape, bool))


def all_cases() -> dict[str, Case]:
    """iris (Fisher 1936), breast cancer Wisconsin with missing cells (Street et al. 1993)
    and diabetes (Efron et al. 2004), from tests/engine_rows.py, plus `many_trees`."""
    chosen = {n: c for n, c in cases().items() if n != "wine"}
    return {**chosen, "diabetes_110_trees": many_trees()}


def run(engine: Engine, case: Case, k: int, strategy: str | None = None,
        names: list[str] | None = None) -> tuple[ScoredRows, CompiledQuery]:
    """Load the case's rows, compile with K reasons for the engine's dialect, fetch."""
    profile = load_profile(engine.dialect)
    table = f"t2s_reasons_{case.name}"
    load_rows(engine, profile, table, case.X, names or list(case.forest.feature_names),
              case.null_mask)
    request = ScoringRequest(table=table, keys=(KEY,), reasons=k, strategy=strategy)
    compiled = compile_forest(case.forest, request, profile)
    for statement in compiled.setup:
        engine.execute(statement)
    return fetch_scored_rows(engine, compiled, request), compiled


def refused(X: np.ndarray) -> np.ndarray:
    """Rows scikit-learn refuses: X is cast to float32 and must be finite or NaN
    (IEEE 754 overflow to infinity as numpy implements the cast)."""
    with np.errstate(over="ignore"):
        x32 = X.astype(np.float32)
    return np.any(np.isinf(x32), axis=1)


def explained_index(estimator: Any, X: np.ndarray) -> np.ndarray:
    """Per row, the value column explained: the value (regressor), the second class
    (binary), the predicted class (multiclass: numpy's first largest probability)."""
    if not hasattr(estimator, "classes_"):
        return np.zeros(len(X), dtype=int)
    if len(estimator.classes_) == 2:
        return np.ones(len(X), dtype=int)
    return np.argmax(estimator.predict_proba(X), axis=1)


@functools.cache
def case_reference(name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(rows the library scores, their credits, their baselines) for a case, computed once."""
    case = all_cases()[name]
    keep = np.flatnonzero(~refused(case.X))
    return (keep, *reference_credits(case.estimator, case.X[keep]))


def reference_credits(estimator: Any, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(credits (rows, features), baseline per row) from the library's own trees."""
    members = getattr(estimator, "estimators_", None) or [estimator]
    j = explained_index(estimator, X)
    credits = np.zeros(X.shape)
    base = np.zeros(len(X))
    for member in members:
        tree, path = member.tree_, member.decision_path(X)
        for r in range(len(X)):
            nodes = np.sort(path.indices[path.indptr[r]:path.indptr[r + 1]])
            base[r] += tree.value[0, 0, j[r]]
            for parent, child in zip(nodes[:-1], nodes[1:], strict=True):
                assert child in (tree.children_left[parent], tree.children_right[parent])
                credits[r, tree.feature[parent]] += (tree.value[child, 0, j[r]]
                                                     - tree.value[parent, 0, j[r]])
    return credits / len(members), base / len(members)


def reason_table(scored: ScoredRows, compiled: CompiledQuery) -> tuple[np.ndarray, np.ndarray]:
    """(names (rows, K) object, contributions (rows, K) float with NaN for NULL)."""
    columns = compiled.reason_columns
    names = np.column_stack([scored.reasons[c] for c in columns[0::2]])
    values = np.column_stack([[np.nan if v is None else float(v) for v in scored.reasons[c]]
                              for c in columns[1::2]])
    return names, values


def tolerance(case: Case, score: float) -> float:
    """1e-12 for probabilities; relative to max(1, |value|) for a regressor's value."""
    return TOLERANCE if case.forest.is_classifier else TOLERANCE * max(1.0, abs(score))


@pytest.mark.parametrize("dialect", DIALECTS)
@pytest.mark.parametrize("name", sorted(all_cases()))
def test_contributions_add_up_and_match_the_library(engines, dialect, name):
    """All used features as reasons: (a) mean root value + sum = the SQL's score; (b) each
    contribution equals the reference; (c) order by |contribution|, ties in feature order;
    (d) rows the library refuses get NULL reasons."""
    case = all_cases()[name]
    used = sorted({int(f) for m in getattr(case.estimator, "estimators_", [case.estimator])
                   for f in m.tree_.feature[m.tree_.children_left >= 0]})
    scored, compiled = run(engines(dialect), case, len(used))
    names, values = reason_table(scored, compiled)
    null = refused(case.X)
    assert null.sum() >= 3
    assert all(v is None for v in names[null].ravel()) and np.isnan(values[null]).all()
    keep, credits, base = case_reference(name)
    feature_names = list(case.forest.feature_names)
    for row, ref, b in zip(keep.tolist(), credits, base, strict=True):
        got = values[row]
        index = [feature_names.index(n) for n in names[row].tolist()]
        assert sorted(index) == used
        score = scored.values[row]
        explained = score[0] if not case.forest.is_classifier else \
            score[1] if len(score) == 2 else score.max()
        tol = tolerance(case, explained)
        assert abs(b + got.sum() - explained) <= tol, (row, b + got.sum(), explained)
        assert np.abs(got - ref[index]).max() <= tol, (row, got, ref[index])
        # The tie rule on the SQL's own numbers: |c| descending, then model feature order.
        assert index == sorted(index, key=lambda i: (-abs(got[index.index(i)]), i))
        # Against the reference wherever its magnitudes are apart by more than the tolerance.
        expected = sorted(used, key=lambda i: (-abs(ref[i]), i))
        for k, (mine, theirs) in enumerate(zip(index, expected, strict=True)):
            assert mine == theirs or abs(abs(ref[mine]) - abs(ref[theirs])) <= tol, (row, k)


def assert_top_three(scored: ScoredRows, compiled, case: Case) -> None:
    """The three largest credits of each row, by name and value, as the reference has them."""
    names, values = reason_table(scored, compiled)
    keep, credits, _ = case_reference(case.name)
    feature_names = list(case.forest.feature_names)
    for row, ref in zip(keep.tolist(), credits, strict=True):
        order = sorted(range(len(ref)), key=lambda i: (-abs(ref[i]), i))[:3]
        assert names[row].tolist() == [feature_names[i] for i in order], row
        assert np.abs(values[row] - ref[order]).max() <= TOLERANCE


def test_top_three_on_clickhouse_forest_levels():
    """ClickHouse's default shape (every tree stepped at once, forest_levels) finds the leaf
    ids the credits are looked up by: top three reasons against this module's reference.
    Breast cancer Wisconsin: Street, Wolberg & Mangasarian (1993), UCI."""
    case = cases()["breast_cancer_missing"]
    engine = open_engine("clickhouse")
    try:
        scored, compiled = run(engine, case, 3)
    finally:
        engine.close()
    assert compiled.strategy == "forest_levels"
    assert_top_three(scored, compiled, case)


@pytest.mark.parametrize("strategy", ["nested_case", "node_arrays", "depth_staged",
                                      "model_table", "text_arrays"])
def test_top_three_on_every_duckdb_strategy(engines, strategy):
    """Each SQL shape finds the leaf ids the credits are looked up by; the verifier's
    own reason check agrees with this module's reference."""
    case = cases()["breast_cancer_missing"]
    scored, compiled = run(engines("duckdb"), case, 3, strategy=strategy)
    assert compiled.strategy == strategy
    assert_top_three(scored, compiled, case)
    if strategy == "nested_case":  # the verifier's own check, once
        request = ScoringRequest(table="t2s_reasons_breast_cancer_missing", keys=(KEY,),
                                 reasons=3, strategy=strategy)
        report = verify(case.estimator, case.forest, engines("duckdb"), request)
        assert report.agrees and report.reasons == 3, report.to_text()
        assert report.reason_disagreements == 0 and report.reason_max_abs_diff <= TOLERANCE


def tie_case(names: list[str]) -> Case:
    """y = a + b on the four corners of the unit square: every path credits a and b
    +-0.5 each, so |contributions| tie exactly (halves are exact binary fractions)."""
    X = np.array([[a, b] for a in (0.0, 1.0) for b in (0.0, 1.0)] * 5)
    frame = pd.DataFrame(X, columns=names)
    model = DecisionTreeRegressor(random_state=0).fit(frame, X.sum(axis=1))
    return Case("tie", model, ingest(model), X, np.zeros(X.shape, bool))


@pytest.mark.parametrize("dialect", DIALECTS)
def test_ties_go_to_the_first_feature_in_model_order(engines, dialect):
    case = tie_case(["zeta", "alpha"])  # model order differs from name order
    scored, compiled = run(engines(dialect), case, 2)
    names, values = reason_table(scored, compiled)
    assert (names[:, 0] == "zeta").all() and (names[:, 1] == "alpha").all()
    expected = np.where(case.X == 1.0, 0.5, -0.5)  # corner minus the mean of 1 per feature
    assert np.array_equal(values, expected)


@pytest.mark.parametrize("dialect", DIALECTS)
def test_hostile_feature_names_come_back_verbatim(engines, dialect):
    """Quotes, a keyword, a semicolon and non-ASCII in feature names: the reason names
    are string literals written through the dialect, never part of the statement.

    iris: R. A. Fisher (1936), Annals of Eugenics 7(2); UCI ML repository.
    """
    X, y = datasets.load_iris(return_X_y=True)
    frame = pd.DataFrame(X, columns=HOSTILE)
    model = RandomForestClassifier(n_estimators=5, max_depth=4, random_state=0).fit(frame, y)
    case = Case("hostile", model, ingest(model), X, np.zeros(X.shape, bool))
    scored, compiled = run(engines(dialect), case, len(case.forest.used_features()))
    names, _ = reason_table(scored, compiled)
    assert {tuple(sorted(row)) for row in names.tolist()} == \
        {tuple(sorted(HOSTILE[i] for i in case.forest.used_features()))}


def test_the_check_catches_wrong_reasons(engines):
    """The verifier's reason check is not vacuous: a nudged contribution or two swapped
    names are disagreements. breast cancer Wisconsin: Street et al. (1993)."""
    case = cases()["breast_cancer_missing"]
    scored, compiled = run(engines("duckdb"), case, 3)
    names, values = reason_table(scored, compiled)
    ref = predict_reference(case.estimator, case.forest, scored.X)
    tol = np.full(len(values), TOLERANCE)

    def disagreements(n: np.ndarray, v: np.ndarray) -> int:
        return check_reason_columns(case.estimator, case.forest, scored.X, n, v,
                                    ref.expected_null, ref.labels, tol).disagreements

    assert disagreements(names, values) == 0
    nudged = values.copy()
    nudged[0, 1] += 1e-9
    assert disagreements(names, nudged) == 1
    swapped = names.copy()
    swapped[5, [0, 1]] = swapped[5, [1, 0]]
    assert disagreements(swapped, values) == 1
    nulls = names.copy()
    nulls[np.flatnonzero(ref.expected_null)[0], 0] = "x0"
    assert disagreements(nulls, values) == 1


def test_off_by_default_and_refused_where_not_covered():
    """No --reasons: the SQL is exactly what it was. Boosting, majority votes and more
    reasons than used features are refused with a UserError."""
    case = cases()["iris"]
    plain = compile_forest(case.forest, ScoringRequest(table="t", keys=(KEY,)))
    assert "reason" not in plain.sql and plain.reason_columns == ()
    with pytest.raises(UserError, match="more|splits on"):
        compile_forest(case.forest, ScoringRequest(table="t", reasons=5))
    with pytest.raises(UserError, match="majority"):
        compile_forest(case.forest, ScoringRequest(table="t", reasons=2,
                                                   combine=Combine.MAJORITY))
    X, y = datasets.load_iris(return_X_y=True)
    boosted = GradientBoostingClassifier(n_estimators=2, random_state=0).fit(X, y)
    with pytest.raises(UserError, match="not available"):
        compile_forest(ingest(boosted), ScoringRequest(table="t", reasons=2))



def test_renders_for_every_dialect():
    """The statement with reasons parses with sqlglot (an independent parser) in every
    dialect tree2sql has a profile for, including those not executed in these tests."""
    case = cases()["iris"]
    for dialect in available():
        compiled = compile_forest(case.forest, ScoringRequest(table="t", keys=(KEY,),
                                                              reasons=2), dialect)
        assert list(compiled.reason_columns) == [
            "score_reason_1", "score_reason_1_contribution",
            "score_reason_2", "score_reason_2_contribution"]
        assert compiled.output_columns[-4:] == list(compiled.reason_columns)
        sqlglot.parse_one(compiled.sql, read=load_profile(dialect).sqlglot_dialect)

def test_cli_compile_and_verify_with_reasons(tmp_path):
    """Through the command line: the columns appear and `verify` checks them (exit 0).

    iris: R. A. Fisher (1936), Annals of Eugenics 7(2); UCI ML repository.
    """
    X, y = datasets.load_iris(return_X_y=True, as_frame=True)
    model = RandomForestClassifier(n_estimators=4, max_depth=3, random_state=0).fit(X, y)
    skops.io.dump(model, tmp_path / "model.skops")
    X.assign(id=range(len(X))).to_csv(tmp_path / "rows.csv", index=False)
    runner = CliRunner()
    compiled = runner.invoke(cli, ["compile", str(tmp_path / "model.skops"), "--table", "t",
                                   "--reasons", "2", "--prefix", "p_"])
    assert compiled.exit_code == 0, compiled.output
    assert '"p_reason_2_contribution"' in compiled.stdout
    checked = runner.invoke(cli, ["verify", str(tmp_path / "model.skops"), "--data",
                                  str(tmp_path / "rows.csv"), "--key", "id", "--reasons", "2"])
    assert checked.exit_code == 0, checked.output
    assert "reason codes        0 disagreements" in checked.stdout
    too_many = runner.invoke(cli, ["compile", str(tmp_path / "model.skops"), "--table", "t",
                                   "--reasons", "9"])
    assert too_many.exit_code == 2 and "fix:" in too_many.output

