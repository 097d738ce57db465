"""leaf_counts: one walk per tree to its leaf's packed class counts, classes by division.

The premise is scikit-learn's own arithmetic: a random forest leaf's class fractions are
whole (bootstrap) counts over `tree_.weighted_n_node_samples`, divided once in IEEE 754
double precision, so SQL dividing the same integers gets the same doubles. The checks run
on SQLite (the standard library's engine) against scikit-learn's predictions, on the
datasets scikit-learn bundles, with the NaN/NULL, float32-boundary and refused rows of
tests/engine_rows.py.
"""

from __future__ import annotations

import numpy as np
import pytest
from engine_rows import KEY, Case, assert_bar, cases, load_rows, open_engine, score
from sklearn.datasets import load_breast_cancer, load_iris, load_wine
from sklearn.ensemble import HistGradientBoostingClassifier, RandomForestClassifier
from sklearn.tree import DecisionTreeClassifier

from tree2sql.compiler import Combine, ScoringRequest, compile_forest
from tree2sql.dialects import load_profile
from tree2sql.errors import UserError
from tree2sql.forest import LEAF
from tree2sql.ingest import ingest
from tree2sql.strategies import choose
from tree2sql.strategies.leaf_counts import leaf_counts, zero_on_top
from tree2sql.verify import verify

CLASSIFIERS = ("iris", "wine", "breast_cancer_missing")


@pytest.fixture(scope="module")
def sqlite():
    engine = open_engine("sqlite")
    yield engine
    engine.close()


@pytest.mark.parametrize("name", CLASSIFIERS)
def test_leaf_counts_agree_on_sqlite(sqlite, name: str) -> None:
    """Iris (Fisher 1936), wine (Forina et al. 1988), breast cancer Wisconsin (Street,
    Wolberg & Mangasarian 1993; trained with 8% missing cells): SQLite's default shape for
    forest classifiers agrees with scikit-learn row for row, NULL scores where refused."""
    case = cases()[name]
    assert choose(case.forest, load_profile("sqlite"))[0].name == "leaf_counts"
    report = score(sqlite, case, "leaf_counts")
    assert report.strategy == "leaf_counts"
    assert_bar(report, case)


def test_each_tree_is_walked_once() -> None:
    """Three classes (wine), yet every split is written once: one walk per tree, where
    nested_case writes each tree once per class."""
    forest = cases()["wine"].forest
    splits = sum(int((tree.left != LEAF).sum()) for tree in forest.trees)
    request = ScoringRequest("t", (KEY,))
    counts = compile_forest(forest, request, "sqlite")
    plain = compile_forest(forest, ScoringRequest("t", (KEY,), strategy="nested_case"), "sqlite")
    assert counts.strategy == "leaf_counts"
    # beyond the splits, only the compiler's own few CASEs (refused-row guard, label)
    assert splits <= counts.sql.count("CASE WHEN") < splits + 10
    assert plain.sql.count("CASE WHEN") >= 3 * splits


def test_codes_are_the_library_counts() -> None:
    """Decoding a leaf's code gives scikit-learn's own samples and class counts."""
    X, y = load_wine(return_X_y=True)
    model = RandomForestClassifier(n_estimators=5, random_state=0).fit(X, y)
    codes, bits = leaf_counts(ingest(model))
    mask = (1 << bits) - 1
    for estimator, code in zip(model.estimators_, codes, strict=True):
        leaf = estimator.tree_.children_left == -1
        samples = estimator.tree_.weighted_n_node_samples[leaf]
        counts = [(code[leaf] >> (bits * k)) & mask for k in range(3)]
        assert np.array_equal(counts[0], samples)  # slot 0 holds N
        for k in (1, 2):
            assert np.array_equal(counts[k] / samples, estimator.tree_.value[leaf, 0, k])
        assert zero_on_top(bits, 3)  # class 0's count above the others, for a shift alone
        assert np.array_equal((code[leaf] >> (bits * 3)) / samples,
                              estimator.tree_.value[leaf, 0, 0])


def test_class_zero_below_the_top_where_its_count_does_not_fit(sqlite) -> None:
    """Leaves of 2^16 samples and more leave no room for class 0's count above three
    classes' fields (16 bits x 4 > 62): class 0 is then N minus the others, and still agrees
    with scikit-learn. Iris (Fisher 1936) repeated 500 times, so that a stump's leaves hold
    tens of thousands of samples; scored on the 150 original rows."""
    X, y = load_iris(return_X_y=True)
    model = RandomForestClassifier(n_estimators=2, max_depth=1, random_state=0)
    model.fit(np.tile(X, (500, 1)), np.tile(y, 500))
    forest = ingest(model)
    codes, bits = leaf_counts(forest)
    assert bits == 16 and not zero_on_top(bits, 3)
    case = Case("iris_repeated", model, forest, X, np.zeros(X.shape, dtype=bool))
    report = score(sqlite, case, "leaf_counts")
    assert report.strategy == "leaf_counts"
    assert report.rows == len(X) and report.disagreements == 0, report.to_text()
    assert report.max_abs_diff == 0.0, report.to_text()


def test_models_without_counts_take_another_shape() -> None:
    """Regressors, boosted trees and fractional sample weights are not counts over samples:
    the planner passes over leaf_counts, saying why, to the next shape that fits."""
    profile = load_profile("sqlite")
    X, y = load_breast_cancer(return_X_y=True)
    boosted = ingest(HistGradientBoostingClassifier(max_iter=5, random_state=0).fit(X, y))
    weights = np.random.default_rng(0).uniform(0.5, 1.5, len(y))
    # A single tree's leaves hold fractions of the weights themselves, so impure leaves
    # (max_depth 3) are no ratio of whole counts. (A forest's weighted leaf samples stayed
    # whole numbers in scikit-learn 1.9.1, observed here, so a forest is no such example.)
    weighted = ingest(DecisionTreeClassifier(max_depth=3, random_state=0)
                      .fit(X, y, sample_weight=weights))
    for forest, why in ((cases()["diabetes"].forest, "forest classifier"),
                        (boosted, "forest classifier"), (weighted, "whole counts")):
        strategy, reason = choose(forest, profile)
        assert strategy.name != "leaf_counts" and "not leaf_counts: leaf_counts" in reason
        assert why in reason, reason


def test_votes_and_forced_use_fall_back_to_walks(sqlite) -> None:
    """Majority votes are not class fractions, and a regressor has no counts: forced
    leaf_counts writes the plain walks for them, and they still agree."""
    case = cases()["breast_cancer_missing"]
    table = "t2s_votes_rows"
    load_rows(sqlite, load_profile("sqlite"), table, case.X, case.forest.feature_names,
              case.null_mask)
    request = ScoringRequest(table=table, keys=(KEY,), strategy="leaf_counts",
                             combine=Combine.MAJORITY)
    report = verify(case.estimator, case.forest, sqlite, request)
    assert report.disagreements == 0 and report.rows == len(case.X), report.to_text()
    regression = score(sqlite, cases()["diabetes"], "leaf_counts")
    assert_bar(regression, cases()["diabetes"])


def test_forced_where_the_dialect_lacks_integer_bits() -> None:
    """A clear error naming the profile key, not SQL with operators the engine lacks."""
    with pytest.raises(UserError, match="integer_bits"):
        compile_forest(cases()["iris"].forest,
                       ScoringRequest("t", (KEY,), strategy="leaf_counts"), "oracle")
