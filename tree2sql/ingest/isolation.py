"""scikit-learn IsolationForest: anomaly scores from path lengths.

Liu, Ting & Zhou (ICDM 2008): score = 2 ** (-E[h(x)] / c(n)), where h(x) is the depth of
x's leaf plus c(leaf size) for the unbuilt part of the tree, and c(n) = 2 H(n-1) - 2(n-1)/n.
Each leaf's corrected path length is taken from the library's own per-tree arrays and
stored as the leaf value, so the SQL only sums in tree order and applies POWER.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sklearn.ensemble._iforest import _average_path_length

from tree2sql.errors import UserError
from tree2sql.forest import LEAF, Aggregation, Comparison, Forest, Link, Task, Tree
from tree2sql.ingest import reads
from tree2sql.ingest.sklearn_trees import _accepts_missing, _feature_names, _read_tree


@reads("IsolationForest")
def read_isolation_forest(estimator: Any) -> Forest:
    members = getattr(estimator, "estimators_", None)
    if not members:
        raise UserError("this IsolationForest has not been fitted",
                        "call fit() before saving it")
    c_subsample = float(_average_path_length([estimator._max_samples])[0])
    if c_subsample == 0.0:
        raise UserError("this IsolationForest was fitted on one sample per tree, so every "
                        "score is the constant 1", "fit it with max_samples of 2 or more")
    trees = []
    for t, (member, features) in enumerate(zip(members, estimator.estimators_features_,
                                                strict=True)):
        tree = _read_tree(member.tree_, Task.REGRESSION)
        # The library's per-leaf sum: depth + c(leaf samples) - 1.0, in this order.
        lengths = (estimator._decision_path_lengths[t]
                   + estimator._average_path_length_per_tree[t] - 1.0)
        feature = np.where(tree.left == LEAF, 0, np.asarray(features)[tree.feature])
        trees.append(Tree(feature.astype(np.int64), tree.threshold, tree.left, tree.right,
                          tree.missing_left, np.ascontiguousarray(lengths[:, None],
                                                                  dtype=np.float64)))
    return Forest(
        task=Task.ANOMALY,
        trees=tuple(trees),
        feature_names=_feature_names(estimator),
        comparison=Comparison.FLOAT32_LE,
        accepts_missing=_accepts_missing(estimator),
        source=f"scikit-learn IsolationForest ({len(trees)} trees)",
        refuses_float32_overflow=False,  # casts to float32 (overflow -> inf) but refuses none
        aggregation=Aggregation(mean=False, initial=(0.0,), link=Link.ISOLATION,
                                tree_output=(0,) * len(trees),
                                divisor=len(trees) * c_subsample,
                                offset=float(estimator.offset_)),
    )
