"""The compiled SQL agrees with scikit-learn row for row on the datasets the library bundles.

Each dataset is named with its published source. Models are fit on part of the rows and
checked on all of them (seen and unseen rows), through both SQL shapes, in embedded DuckDB.
The reference is the estimator's own predict/predict_proba.
"""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pytest
from helpers import STRATEGIES, assert_agrees, check, load_rows
from sklearn import datasets
from sklearn.ensemble import (
    ExtraTreesClassifier,
    ExtraTreesRegressor,
    RandomForestClassifier,
    RandomForestRegressor,
)
from sklearn.tree import (
    DecisionTreeClassifier,
    DecisionTreeRegressor,
    ExtraTreeClassifier,
    ExtraTreeRegressor,
)

from tree2sql.compiler import Combine, ScoringRequest
from tree2sql.engines import DuckDBEngine
from tree2sql.ingest import ingest
from tree2sql.verify import verify

CLASSIFICATION = {
    # iris: R. A. Fisher (1936), "The use of multiple measurements in taxonomic problems",
    # Annals of Eugenics 7(2); UCI ML repository.
    "iris": datasets.load_iris,
    # breast cancer Wisconsin (diagnostic): W. N. Street, W. H. Wolberg, O. L. Mangasarian
    # (1993), "Nuclear feature extraction for breast tumor diagnosis"; UCI ML repository.
    "breast_cancer": datasets.load_breast_cancer,
    # wine: M. Forina et al., PARVUS (Genoa); UCI ML repository "Wine" data set.
    "wine": datasets.load_wine,
    # digits: UCI ML repository, "Optical Recognition of Handwritten Digits"
    # (E. Alpaydin, C. Kaynak, 1998); scikit-learn bundles its 8x8 test part.
    "digits": datasets.load_digits,
}
# diabetes: B. Efron, T. Hastie, I. Johnstone, R. Tibshirani (2004), "Least Angle
# Regression", Annals of Statistics 32(2).
REGRESSION = {"diabetes": datasets.load_diabetes}

TREES = 10  # small forests keep the suite fast; agreement does not depend on the count
# digits has 10 classes and 64 features: fully grown trees there are large, and DuckDB takes
# seconds to plan one nested CASE per class per tree, so its forests are smaller and fit
# on fewer rows (still fully grown: every leaf pure).
TREES_FOR = {"digits": 3}
FIT_SHARE = {"digits": 0.3}

CLASSIFIERS = {
    "tree_full": lambda n: DecisionTreeClassifier(random_state=0),
    "tree_shallow_random_split": lambda n: DecisionTreeClassifier(
        max_depth=4, splitter="random", random_state=0),
    "extra_tree": lambda n: ExtraTreeClassifier(random_state=0),
    "forest_full": lambda n: RandomForestClassifier(n_estimators=n, random_state=0),
    "forest_subsampled": lambda n: RandomForestClassifier(
        n_estimators=n, bootstrap=True, max_samples=0.5, max_features=0.3,
        max_depth=8, random_state=1),
    "forest_no_bootstrap": lambda n: RandomForestClassifier(
        n_estimators=n, bootstrap=False, max_features=None, min_samples_leaf=3,
        random_state=2),
    "extra_full": lambda n: ExtraTreesClassifier(n_estimators=n, random_state=0),
    "extra_bootstrap": lambda n: ExtraTreesClassifier(
        n_estimators=n, bootstrap=True, max_features="log2", criterion="entropy",
        random_state=3),
}
REGRESSORS = {
    "tree_full": lambda n: DecisionTreeRegressor(random_state=0),
    "extra_tree": lambda n: ExtraTreeRegressor(random_state=0),
    "forest_full": lambda n: RandomForestRegressor(n_estimators=n, random_state=0),
    "forest_subsampled": lambda n: RandomForestRegressor(
        n_estimators=n, max_samples=0.6, max_features=0.5, max_depth=6,
        criterion="absolute_error", random_state=1),
    "extra_full": lambda n: ExtraTreesRegressor(n_estimators=n, random_state=0),
    "extra_bootstrap": lambda n: ExtraTreesRegressor(
        n_estimators=n, bootstrap=True, max_features=0.5, criterion="poisson",
        random_state=2),
}


def _split(X: np.ndarray, y: np.ndarray, share: float = 0.7) -> tuple[np.ndarray, np.ndarray]:
    """Fit on a fixed share of the rows; the check uses every row."""
    fit = np.random.default_rng(7).random(len(X)) < share
    return X[fit], y[fit]


@pytest.mark.parametrize("strategy", STRATEGIES)
@pytest.mark.parametrize("model", sorted(CLASSIFIERS))
@pytest.mark.parametrize("dataset", sorted(CLASSIFICATION))
def test_classifiers_agree_average_and_majority(dataset, model, strategy):
    X, y = CLASSIFICATION[dataset](return_X_y=True)
    estimator = CLASSIFIERS[model](TREES_FOR.get(dataset, TREES)).fit(
        *_split(X, y, FIT_SHARE.get(dataset, 0.7)))
    forest = ingest(estimator)
    for combine in Combine:
        report = check(estimator, X, strategy=strategy, combine=combine, forest=forest)
        assert_agrees(report)
        assert report.null_scores == 0


@pytest.mark.parametrize("strategy", STRATEGIES)
@pytest.mark.parametrize("model", sorted(REGRESSORS))
@pytest.mark.parametrize("dataset", sorted(REGRESSION))
def test_regressors_agree(dataset, model, strategy):
    X, y = REGRESSION[dataset](return_X_y=True)
    estimator = REGRESSORS[model](TREES).fit(*_split(X, y))
    report = check(estimator, X, strategy=strategy)
    assert_agrees(report)
    assert report.null_scores == 0


def test_fully_grown_trees_are_deep():
    """The 'fully grown' cases really are unbounded: leaves are pure on the fitted rows."""
    X, y = datasets.load_digits(return_X_y=True)
    estimator = CLASSIFIERS["forest_full"](TREES_FOR["digits"]).fit(
        *_split(X, y, FIT_SHARE["digits"]))
    forest = ingest(estimator)
    assert max(tree.depth() for tree in forest.trees) >= 12
    leaf_values = np.concatenate([t.value[t.is_leaf()] for t in forest.trees])
    assert np.all(leaf_values.max(axis=1) == 1.0)


LABELS = {
    "int": lambda y: (y * 10 - 3).astype(np.int64),  # negative and gapped integers
    "str": lambda y: np.array(["setosa's", "versi color", "virginica"])[y],
    "bool": lambda y: y == 1,
}


@pytest.mark.parametrize("strategy", STRATEGIES)
@pytest.mark.parametrize("kind", sorted(LABELS))
def test_label_types(kind, strategy):
    """int, str and bool labels come back from SQL equal to the library's own labels."""
    X, y = datasets.load_iris(return_X_y=True)  # iris: Fisher 1936, UCI ML repository
    labels = LABELS[kind](y)
    estimator = RandomForestClassifier(n_estimators=TREES, random_state=0).fit(
        *_split(X, labels))
    forest = ingest(estimator)
    assert [type(c) for c in forest.classes] == [type(labels[0].item())] * len(forest.classes)
    for combine in Combine:
        assert_agrees(check(estimator, X, strategy=strategy, combine=combine, forest=forest))


@pytest.mark.parametrize("strategy", STRATEGIES)
@pytest.mark.parametrize("column_type", ["DECIMAL(6,2)", "FLOAT", "INTEGER", "BIGINT"])
def test_non_double_columns_are_cast_once(column_type, strategy):
    """Integer, decimal and real columns are cast to double before any comparison.

    wine (Forina et al., UCI ML repository): its values carry at most two decimals, so a
    DECIMAL(6,2) column holds them exactly; FLOAT (float32) and integer columns hold what
    the engine stores, and the check reads those same stored values back for the model.
    """
    X, y = datasets.load_wine(return_X_y=True)
    estimator = RandomForestClassifier(n_estimators=TREES, random_state=0).fit(*_split(X, y))
    forest = ingest(estimator)
    engine = DuckDBEngine()
    load_rows(engine, X, forest.feature_names, table="raw")
    casts = ", ".join(f'CAST("{n}" AS {column_type}) AS "{n}"' for n in forest.feature_names)
    engine.execute(f'CREATE TABLE typed AS SELECT row_id, {casts} FROM raw')
    types = {c.type for c in engine.columns("typed") if c.name != "row_id"}
    assert types == {column_type}
    request = ScoringRequest(table="typed", keys=("row_id",), strategy=strategy)
    assert_agrees(verify(estimator, forest, engine, request))


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_disagreement_is_explained(strategy):
    """A forest whose first root threshold was moved disagrees; the report says where.

    The moved threshold stands for an ingest bug: the SQL follows the altered forest, the
    reference is the estimator itself, so rows on the moved side of the root disagree and
    each explanation must name tree 0, its root node and the root's feature.
    """
    X, y = datasets.load_iris(return_X_y=True)  # iris: Fisher 1936, UCI ML repository
    estimator = RandomForestClassifier(n_estimators=TREES, random_state=0).fit(X, y)
    forest = ingest(estimator)
    first = forest.trees[0]
    root_feature = int(first.feature[0])
    moved = first.threshold.copy()
    moved[0] = np.median(X[:, root_feature])
    assert moved[0] != first.threshold[0]
    altered = replace(forest, trees=(replace(first, threshold=moved), *forest.trees[1:]),
                      _fingerprint=[])
    report = check(estimator, X, strategy=strategy, forest=altered)
    assert report.disagreements > 0
    assert 0 < len(report.examples) <= 5
    for example in report.examples:
        assert example["tree"] == 0
        assert example["node"] == 0
        assert example["feature"] == forest.feature_names[root_feature]
        assert example["threshold"] == moved[0]
        assert example["sql_leaf"] != example["model_leaf"]
    assert json.loads(report.to_json())["examples"][0]["tree"] == 0
