"""scikit-learn decision trees, random forests and extra-trees."""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from tree2sql.errors import UserError
from tree2sql.forest import LEAF, Comparison, Forest, Task, Tree
from tree2sql.ingest import reads

CLASSIFIERS = ("DecisionTreeClassifier", "RandomForestClassifier", "ExtraTreesClassifier",
               "ExtraTreeClassifier")
REGRESSORS = ("DecisionTreeRegressor", "RandomForestRegressor", "ExtraTreesRegressor",
              "ExtraTreeRegressor")


@reads(*CLASSIFIERS, *REGRESSORS)
def read_tree_ensemble(estimator: Any) -> Forest:
    name = type(estimator).__name__
    _check_fitted(estimator, name)
    if getattr(estimator, "n_outputs_", 1) != 1:
        raise UserError(f"this {name} predicts {estimator.n_outputs_} outputs at once",
                        "tree2sql compiles single-output models; train one model per output")
    members = getattr(estimator, "estimators_", None) or [estimator]
    task = Task.CLASSIFICATION if name in CLASSIFIERS else Task.REGRESSION
    trees = tuple(_read_tree(member.tree_, task) for member in members)
    classes = tuple(estimator.classes_.tolist()) if task is Task.CLASSIFICATION else None
    return Forest(
        task=task,
        trees=trees,
        feature_names=_feature_names(estimator),
        comparison=Comparison.FLOAT32_LE,
        accepts_missing=_accepts_missing(estimator),
        classes=classes,
        source=f"scikit-learn {name} ({len(trees)} trees)",
    )


def _check_fitted(estimator: Any, name: str) -> None:
    fitted = hasattr(estimator, "tree_") or bool(getattr(estimator, "estimators_", None))
    if not fitted:
        raise UserError(f"this {name} has not been fitted", "call fit() before saving it")


def _read_tree(tree: Any, task: Task) -> Tree:
    left = tree.children_left.astype(np.int64)
    value = tree.value[:, 0, :].astype(np.float64)  # scikit-learn stores class fractions
    if task is Task.REGRESSION:
        value = value[:, :1]
    missing = getattr(tree, "missing_go_to_left", None)
    missing = np.zeros_like(left, dtype=bool) if missing is None else missing.astype(bool)
    feature = np.where(left == LEAF, 0, tree.feature).astype(np.int64)
    return Tree(
        feature=feature,
        threshold=tree.threshold.astype(np.float64),
        left=left,
        right=tree.children_right.astype(np.int64),
        missing_left=missing,
        value=np.ascontiguousarray(value),
        samples=tree.weighted_n_node_samples.astype(np.float64),
    )


def _feature_names(estimator: Any) -> tuple[str, ...]:
    names = getattr(estimator, "feature_names_in_", None)
    if names is not None:
        return tuple(str(n) for n in names)
    return tuple(f"x{i}" for i in range(estimator.n_features_in_))


def _accepts_missing(estimator: Any) -> bool:
    """Ask the library itself: does it score a row of NaN, or refuse it?"""
    row = np.full((1, estimator.n_features_in_), np.nan)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # fitted with names, asked without: harmless
            estimator.predict(row)
    except ValueError:
        return False
    return True
