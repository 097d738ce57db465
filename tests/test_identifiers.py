"""Hostile feature names and class labels cannot change the statement.

Names carry quotes, spaces, SQL keywords, semicolons, backslashes, unicode and case-only
differences. The compiled SQL must run in DuckDB and agree with the model, and sqlglot
(an independent SQL parser) must read each name back as one identifier and each label as
one string literal of a single statement.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import sqlglot
from helpers import KEY, STRATEGIES, TABLE, assert_agrees, check, load_rows
from sklearn.ensemble import RandomForestClassifier
from sqlglot import exp

from tree2sql.compiler import Combine, ScoringRequest, compile_forest
from tree2sql.engines import DuckDBEngine
from tree2sql.errors import UserError
from tree2sql.ingest import ingest

HOSTILE_FEATURES = ['a"b', "it's", "with space", "select", "from", "order", "semi;colon",
                    "back\\slash", "température °C", "風速", '"); DROP TABLE t; --',
                    "tab\there"]
HOSTILE_LABELS = ['x"y', "o'clock", "select", "'; DROP TABLE t; --", "Cold", "cold", "風",
                  "back\\slash"]


def hostile_model(features=HOSTILE_FEATURES, labels=HOSTILE_LABELS, seed: int = 0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(600, len(features)))
    y = np.array(labels, dtype=object)[np.argmax(X[:, :len(labels)]
                                                 + rng.normal(0, 0.3, (600, len(labels))),
                                                 axis=1) % len(labels)]
    frame = pd.DataFrame(X, columns=features)
    model = RandomForestClassifier(n_estimators=5, max_depth=7, random_state=seed)
    return model.fit(frame, y), X


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_hostile_names_run_and_agree(strategy):
    model, X = hostile_model()
    forest = ingest(model)
    assert forest.feature_names == tuple(HOSTILE_FEATURES)
    assert set(forest.classes) == set(HOSTILE_LABELS)
    for combine in Combine:
        report = check(model, X, strategy=strategy, combine=combine, forest=forest)
        assert_agrees(report)


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_output_columns_come_back_as_named(strategy):
    model, X = hostile_model()
    forest = ingest(model)
    engine = DuckDBEngine()
    load_rows(engine, X, forest.feature_names)
    compiled = compile_forest(forest, ScoringRequest(table=TABLE, keys=(KEY,),
                                                     strategy=strategy))
    result = engine.con.execute(compiled.sql)
    names = [d[0] for d in result.description]
    assert names == compiled.output_columns
    assert len({n.casefold() for n in names}) == len(names)  # 'Cold' and 'cold' kept apart
    labels = {row[-1] for row in result.fetchall()}
    assert labels <= set(HOSTILE_LABELS) and len(labels) > 1


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_sqlglot_reads_each_name_as_one_token(strategy):
    model, _ = hostile_model()
    forest = ingest(model)
    compiled = compile_forest(forest, ScoringRequest(table=TABLE, keys=(KEY,),
                                                     strategy=strategy))
    statements = sqlglot.parse(compiled.sql, read="duckdb")
    assert len(statements) == 1
    tree = statements[0]
    identifiers = [node.this for node in tree.find_all(exp.Identifier)]
    strings = [node.this for node in tree.find_all(exp.Literal) if node.is_string]
    for name in HOSTILE_FEATURES:
        assert name in identifiers, name
    for label in HOSTILE_LABELS:
        assert label in strings, label
    # Read as identifiers, the hostile names never became keywords or statements.
    assert not list(tree.find_all(exp.Drop))
    assert isinstance(tree, exp.Select)


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_features_differing_only_in_case_are_mapped_to_distinct_columns(strategy):
    """DuckDB cannot hold columns "Temp" and "temp" in one table (names compare without
    case), so such features are read from other columns through the column map."""
    features = ["Temp", "temp", "TEMP"]
    model, X = hostile_model(features, ["hot", "Hot", "HOT"], seed=3)
    columns = {"Temp": "temp_upper_first", "temp": "temp_lower", "TEMP": "temp_all_upper"}
    report = check(model, X, strategy=strategy, names=list(columns.values()),
                   columns=columns)
    assert_agrees(report)


def test_table_columns_differing_only_in_case_are_refused():
    """A model feature whose name matches two table columns up to case is ambiguous."""
    model, X = hostile_model(["Speed", "load"], ["a", "b"], seed=4)
    forest = ingest(model)
    engine = DuckDBEngine()
    load_rows(engine, X, ["speed", "load"])  # the table says "speed", the model "Speed"
    request = ScoringRequest(table=TABLE, keys=(KEY,))
    from tree2sql.verify import verify

    with pytest.raises(UserError, match="Speed"):
        verify(model, forest, engine, request)
