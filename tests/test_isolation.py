"""IsolationForest compiled to SQL agrees with scikit-learn's score_samples and
decision_function (Liu, Ting & Zhou, ICDM 2008), row for row, within 1e-12 relative."""

from __future__ import annotations

import pytest
from sklearn.datasets import load_wine
from sklearn.ensemble import IsolationForest
from test_boosting import STRATEGIES, assert_agrees, score_in_duckdb, with_edge_rows

from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.errors import UserError
from tree2sql.forest import Link, Task
from tree2sql.ingest import ingest


@pytest.mark.filterwarnings("ignore:overflow encountered in cast:RuntimeWarning")
@pytest.mark.parametrize("options", [{}, {"max_features": 0.5, "contamination": 0.1}])
@pytest.mark.parametrize("strategy", STRATEGIES)
def test_isolation_forest_wine(strategy, options):
    # Wine: Forina et al., UCI ML repository. With max_features < 1 each tree sees its own
    # feature subset; contamination sets offset_ from the training scores.
    X, _ = load_wine(return_X_y=True)
    model = IsolationForest(n_estimators=30, random_state=0, **options).fit(X)
    forest = ingest(model)
    assert forest.task is Task.ANOMALY and forest.aggregation.link is Link.ISOLATION
    rows, nulls = with_edge_rows(forest, X)
    report = score_in_duckdb(model, rows, strategy, nulls)
    assert_agrees(report)
    # The library takes NaN (per-node missing direction) and casts huge values to inf
    # rather than refusing them, so every row gets a score.
    assert report.null_scores == 0
    assert report.max_abs_diff <= 1e-12


def test_isolation_forest_outputs_score_and_decision():
    X, _ = load_wine(return_X_y=True)
    forest = ingest(IsolationForest(n_estimators=3, random_state=0).fit(X))
    compiled = compile_forest(forest, ScoringRequest(table="t", keys=["id"]))
    assert compiled.score_columns == ["score_value", "score_decision"]
    assert compiled.label_column is None


def test_isolation_forest_of_single_samples_is_refused():
    X, _ = load_wine(return_X_y=True)
    model = IsolationForest(n_estimators=2, max_samples=1, random_state=0).fit(X)
    with pytest.raises(UserError, match="one sample"):
        ingest(model)
