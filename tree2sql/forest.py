"""The neutral model: a tree ensemble as flat numpy arrays.

Ingest modules turn a library's estimator into a `Forest`; strategies turn a `Forest`
into SQL. Nothing past this module looks at a library object, so a forest of millions
of nodes stays a handful of arrays rather than millions of Python objects.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from enum import Enum

import numpy as np

LEAF = -1  # child index marking a leaf, as in scikit-learn's tree arrays


class Comparison(Enum):
    """How the model compares a feature value with a node's threshold.

    The rule belongs to the ingested model, not to the SQL strategy: the strategy asks
    `tree2sql.exact` for bounds that make a double comparison in SQL agree with it.
    """

    FLOAT32_LE = "float32(x) <= threshold"  # scikit-learn trees and forests
    FLOAT64_LE = "x <= threshold"  # histogram boosting, LightGBM
    FLOAT32_LT = "float32(x) < threshold"  # XGBoost


class Task(Enum):
    CLASSIFICATION = "classification"
    REGRESSION = "regression"


@dataclass(frozen=True, eq=False)
class Tree:
    """One binary tree in parallel arrays indexed by node id (root is node 0).

    `value[n]` holds the node's output row: class probabilities for a classifier, a
    single value for a regressor. `missing_left[n]` says where a missing value goes.
    """

    feature: np.ndarray  # int64, feature index per node (undefined at leaves)
    threshold: np.ndarray  # float64, the model's own threshold per node
    left: np.ndarray  # int64, left child or LEAF
    right: np.ndarray  # int64, right child or LEAF
    missing_left: np.ndarray  # bool
    value: np.ndarray  # float64, shape (n_nodes, n_outputs)

    @property
    def n_nodes(self) -> int:
        return int(self.feature.shape[0])

    def is_leaf(self) -> np.ndarray:
        return self.left == LEAF

    def depth(self) -> int:
        """Longest root-to-leaf edge count, computed without recursion."""
        depth = np.zeros(self.n_nodes, dtype=np.int64)
        best = 0
        for node in self.preorder():
            if self.left[node] != LEAF:
                depth[self.left[node]] = depth[self.right[node]] = depth[node] + 1
            else:
                best = max(best, int(depth[node]))
        return best

    def preorder(self) -> list[int]:
        """Node ids root first, left subtree before right (any node numbering)."""
        order: list[int] = []
        stack = [0]
        left, right = self.left, self.right
        while stack:
            node = stack.pop()
            order.append(node)
            if left[node] != LEAF:
                stack.append(int(right[node]))
                stack.append(int(left[node]))
        return order

    def parents(self) -> np.ndarray:
        parent = np.full(self.n_nodes, -1, dtype=np.int64)
        internal = np.flatnonzero(self.left != LEAF)
        parent[self.left[internal]] = internal
        parent[self.right[internal]] = internal
        return parent

    def path_to(self, leaf: int) -> list[int]:
        """Node ids from the root down to `leaf`."""
        parent = self.parents()
        path = [leaf]
        while parent[path[-1]] >= 0:
            path.append(int(parent[path[-1]]))
        return path[::-1]

    def route(self, row: np.ndarray, bound: np.ndarray) -> int:
        """Leaf reached by `row` (float64, NaN = missing) when each split tests x <= bound."""
        node = 0
        while self.left[node] != LEAF:
            x = row[self.feature[node]]
            if np.isnan(x):
                node = self.left[node] if self.missing_left[node] else self.right[node]
            else:
                node = self.left[node] if x <= bound[node] else self.right[node]
        return int(node)


@dataclass(frozen=True, eq=False)
class Forest:
    """A tree ensemble whose prediction is the mean of its trees' leaf values.

    `classes` holds the original labels (any type the library accepts) in the model's
    class order; it is None for a regressor. `accepts_missing` is False when the library
    refuses rows with missing values, in which case such rows get NULL scores.
    """

    task: Task
    trees: tuple[Tree, ...]
    feature_names: tuple[str, ...]
    comparison: Comparison
    accepts_missing: bool
    classes: tuple | None = None
    source: str = ""  # what was ingested, for messages and manifests
    _fingerprint: list = field(default_factory=list, repr=False)

    @property
    def n_features(self) -> int:
        return len(self.feature_names)

    @property
    def n_outputs(self) -> int:
        return int(self.trees[0].value.shape[1])

    @property
    def n_nodes(self) -> int:
        return sum(t.n_nodes for t in self.trees)

    @property
    def is_classifier(self) -> bool:
        return self.task is Task.CLASSIFICATION

    def used_features(self) -> list[int]:
        used: set[int] = set()
        for tree in self.trees:
            used.update(tree.feature[tree.left != LEAF].tolist())
        return sorted(used)

    def fingerprint(self) -> str:
        """SHA-256 over everything that decides a score; names a deployed model version."""
        if not self._fingerprint:
            digest = hashlib.sha256()
            header = (self.task.value, self.comparison.name, self.accepts_missing,
                      self.feature_names, tuple(map(repr, self.classes or ())))
            digest.update(repr(header).encode())
            for tree in self.trees:
                for array in (tree.feature, tree.threshold, tree.left, tree.right,
                              tree.missing_left, tree.value):
                    digest.update(np.ascontiguousarray(array).tobytes())
            self._fingerprint.append(digest.hexdigest())
        return self._fingerprint[0]
