"""scikit-learn gradient boosting: GradientBoosting* and HistGradientBoosting*.

Both sum leaf values onto an initial raw score in stage order and then apply the loss's
link. The leaf values are stored exactly as the library adds them (GradientBoosting:
learning_rate * value, multiplied here in float64 as its predict_stages does), so the SQL
repeats the library's additions one for one.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from tree2sql.errors import UserError
from tree2sql.forest import (
    LEAF,
    Aggregation,
    CategoryTest,
    Comparison,
    Forest,
    Link,
    Task,
    Tree,
)
from tree2sql.ingest import reads
from tree2sql.ingest.sklearn_trees import _accepts_missing, _feature_names, _read_tree

GB_CLASSIFIER, GB_REGRESSOR = "GradientBoostingClassifier", "GradientBoostingRegressor"
HGB_CLASSIFIER, HGB_REGRESSOR = "HistGradientBoostingClassifier", "HistGradientBoostingRegressor"
CATEGORY_THRESHOLD = 0.5  # derived category tests are 0 (left) or 1 (right)

# scikit-learn link classes (sklearn._loss.link) -> the link the SQL applies.
HGB_LINKS = {"IdentityLink": Link.IDENTITY, "LogLink": Link.EXP, "LogitLink": Link.SIGMOID,
             "MultinomialLogit": Link.SOFTMAX}


@reads(GB_CLASSIFIER, GB_REGRESSOR)
def read_gradient_boosting(estimator: Any) -> Forest:
    name = type(estimator).__name__
    stages = getattr(estimator, "estimators_", None)
    if stages is None or len(stages) == 0:
        raise UserError(f"this {name} has not been fitted", "call fit() before saving it")
    classifier = name == GB_CLASSIFIER
    n_stages, n_raw = stages.shape
    # ExponentialLoss predicts expit(2 * raw): doubling every term doubles raw exactly.
    scale = 2.0 if classifier and estimator.loss == "exponential" else 1.0
    initial = _gb_initial(estimator, name) * scale
    rate = float(estimator.learning_rate)
    trees = []
    for stage in range(n_stages):
        for k in range(n_raw):
            tree = _read_tree(stages[stage, k].tree_, Task.REGRESSION)
            value = (rate * tree.value) * scale  # the library's scale * value, in float64
            trees.append(Tree(tree.feature, tree.threshold, tree.left, tree.right,
                              tree.missing_left, np.ascontiguousarray(value)))
    link = Link.IDENTITY
    if classifier:
        link = Link.SIGMOID if n_raw == 1 else Link.SOFTMAX
    return Forest(
        task=Task.CLASSIFICATION if classifier else Task.REGRESSION,
        trees=tuple(trees),
        feature_names=_feature_names(estimator),
        comparison=Comparison.FLOAT32_LE,
        accepts_missing=_accepts_missing(estimator),
        classes=tuple(estimator.classes_.tolist()) if classifier else None,
        source=f"scikit-learn {name} ({n_stages} stages x {n_raw} trees)",
        aggregation=Aggregation(mean=False, initial=tuple(initial.tolist()), link=link,
                                tree_output=tuple(k for _ in range(n_stages)
                                                  for k in range(n_raw)),
                                positive_from_zero=True),
    )


def _gb_initial(estimator: Any, name: str) -> np.ndarray:
    """The initial raw scores, computed by the library itself from a constant estimator."""
    init = estimator.init_
    if isinstance(init, str) and init == "zero":
        return np.zeros(estimator.n_trees_per_iteration_)
    init_name = type(init).__name__
    constant = init_name == "DummyRegressor" or (
        init_name == "DummyClassifier" and init.strategy != "stratified")
    if not constant:
        raise UserError(
            f"this {name} starts from a {init_name} (init=...), whose prediction depends on "
            "the row", "tree2sql compiles boosting started from the default prior, a "
            "constant Dummy estimator or init='zero'; retrain with one of those")
    row = np.zeros((1, estimator.n_features_in_), dtype=np.float32)
    return np.asarray(estimator._raw_predict_init(row)[0], dtype=np.float64)


@reads(HGB_CLASSIFIER, HGB_REGRESSOR)
def read_hist_gradient_boosting(estimator: Any) -> Forest:
    name = type(estimator).__name__
    predictors = getattr(estimator, "_predictors", None)
    if not predictors:
        raise UserError(f"this {name} has not been fitted", "call fit() before saving it")
    classifier = name == HGB_CLASSIFIER
    link = HGB_LINKS.get(type(estimator._loss.link).__name__)
    if link is None:
        raise UserError(f"this {name}'s loss {estimator.loss!r} uses a link tree2sql cannot "
                        "write in SQL", "use a loss with identity, log, logit or softmax link")
    columns = _hgb_input_columns(estimator)
    categories = _hgb_categories(estimator, name)
    derived: dict[CategoryTest, int] = {}
    n_features = estimator.n_features_in_
    trees, owner = [], []
    for iteration in predictors:
        for k, predictor in enumerate(iteration):
            trees.append(_read_predictor(predictor, columns, categories, derived, n_features))
            owner.append(k)
    baseline = np.asarray(estimator._baseline_prediction, dtype=np.float64).reshape(-1)
    return Forest(
        task=Task.CLASSIFICATION if classifier else Task.REGRESSION,
        trees=tuple(trees),
        feature_names=_feature_names(estimator),
        comparison=Comparison.FLOAT64_LE,
        accepts_missing=True,
        classes=tuple(estimator.classes_.tolist()) if classifier else None,
        source=f"scikit-learn {name} ({len(predictors)} iterations x {len(baseline)} trees)",
        refuses_float32_overflow=False,  # compares float64 X, infinities included
        aggregation=Aggregation(mean=False, initial=tuple(baseline.tolist()), link=link,
                                tree_output=tuple(owner), positive_from_zero=False),
        derived=tuple(derived),
    )


def _hgb_input_columns(estimator: Any) -> np.ndarray:
    """Original feature index of each column the predictors read.

    With categorical features the library reorders X (its ColumnTransformer puts the
    encoded categorical columns first, then the numeric ones, each in original order).
    """
    remapped = getattr(estimator, "_is_categorical_remapped", None)
    if getattr(estimator, "_preprocessor", None) is None or remapped is None:
        return np.arange(estimator.n_features_in_)
    categorical = np.asarray(estimator.is_categorical_, dtype=bool)
    return np.concatenate([np.flatnonzero(categorical), np.flatnonzero(~categorical)])


def _hgb_categories(estimator: Any, name: str) -> dict[int, np.ndarray]:
    """Original feature index -> its categories in code order (code i is categories[i])."""
    preprocessor = getattr(estimator, "_preprocessor", None)
    if preprocessor is None:
        return {}
    encoder = preprocessor.named_transformers_["encoder"]
    result = {}
    for feature, values in zip(np.flatnonzero(estimator.is_categorical_), encoder.categories_,
                               strict=True):
        try:
            numbers = np.asarray(values, dtype=np.float64)
        except (TypeError, ValueError):
            raise UserError(
                f"this {name} has text categories in feature "
                f"{_feature_names(estimator)[feature]!r}",
                "encode the categories as numbers before training") from None
        result[int(feature)] = numbers
    return result


def _read_predictor(predictor: Any, columns: np.ndarray, categories: dict[int, np.ndarray],
                    derived: dict[CategoryTest, int], n_features: int) -> Tree:
    nodes = predictor.nodes
    leaf = nodes["is_leaf"].astype(bool)
    feature = np.where(leaf, 0, columns[nodes["feature_idx"]]).astype(np.int64)
    threshold = nodes["num_threshold"].astype(np.float64)
    for node in np.flatnonzero(nodes["is_categorical"].astype(bool) & ~leaf):
        original = int(feature[node])
        test = _category_test(original, categories[original],
                              predictor.raw_left_cat_bitsets[nodes["bitset_idx"][node]])
        feature[node] = n_features + derived.setdefault(test, len(derived))
        threshold[node] = CATEGORY_THRESHOLD
    return Tree(
        feature=feature,
        threshold=np.where(leaf, 0.0, threshold),
        left=np.where(leaf, LEAF, nodes["left"].astype(np.int64)),
        right=np.where(leaf, LEAF, nodes["right"].astype(np.int64)),
        missing_left=nodes["missing_go_to_left"].astype(bool),
        value=np.ascontiguousarray(nodes["value"].astype(np.float64)[:, None]),
    )


def _category_test(feature: int, values: np.ndarray, bitset: np.ndarray) -> CategoryTest:
    """Categories whose code's bit is set go left; other known ones right (the library's
    bitset: bit `code % 32` of word `code // 32`). Missing and unknown values are neither."""
    codes = np.arange(len(values))
    in_left = (bitset[codes // 32] >> (codes % 32).astype(np.uint32)) & 1 == 1
    known = ~np.isnan(values)
    return CategoryTest(feature, tuple(values[in_left & known].tolist()),
                        tuple(values[~in_left & known].tolist()))
