"""The neutral model: a tree ensemble as flat numpy arrays.

Ingest modules turn a library's estimator into a `Forest`; strategies turn a `Forest`
into SQL. Nothing past this module looks at a library object, so a forest of millions
of nodes stays a handful of arrays rather than millions of Python objects.
"""

from __future__ import annotations

import functools
import hashlib
from dataclasses import dataclass, field
from enum import Enum

import numpy as np

from tree2sql.inputs import InputPlan

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
    ANOMALY = "anomaly"  # outputs: the library's score_samples and decision_function


class Link(Enum):
    """The function from the summed raw scores to the model's outputs."""

    IDENTITY = "identity"  # outputs are the raw scores (forests, boosted regressors)
    SIGMOID = "sigmoid"  # binary: p1 = 1 / (1 + exp(-raw)), p0 = 1 - p1
    SOFTMAX = "softmax"  # multiclass: exp(raw_k - max) / sum of those
    EXP = "exp"  # log-link regressors (Poisson, gamma): exp(raw)
    ISOLATION = "isolation"  # s = -2 ** -(raw / divisor); decision = s - offset


@dataclass(frozen=True)
class Aggregation:
    """How per-tree leaf values become the model's outputs.

    `mean`: raw_k is the sum over trees in tree order divided by the number of trees (the
    forests' rule). Otherwise raw_k = initial[k] + the sum, in tree order, of the leaf
    values of the trees feeding output k (boosting; learning rates are already folded
    into the leaf values). `tree_output[t]` names the raw output tree t adds to; None
    means every tree adds its value row to every output. `positive_from_zero` is the
    binary label rule on the single raw score: True for raw >= 0, False for raw > 0.
    """

    mean: bool = True
    initial: tuple[float, ...] = ()
    link: Link = Link.IDENTITY
    tree_output: tuple[int, ...] | None = None
    positive_from_zero: bool = True
    divisor: float = 1.0  # ISOLATION: trees x average path length of the subsample
    offset: float = 0.0  # ISOLATION: the library's offset_


MEAN = Aggregation()


@dataclass(frozen=True)
class CategoryTest:
    """A derived input: 0 when `feature`'s value is one of `left`, 1 when one of `right`,
    missing otherwise (unknown categories follow the node's missing direction).

    Trees test it with threshold 0.5 like any numeric feature; its index is
    `n_features + position in Forest.derived`.
    """

    feature: int
    left: tuple[float, ...]
    right: tuple[float, ...]


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
    # float64, the (weighted) training samples that reached each node, where the library
    # records them: a forest's class fractions are counts over this (strategies/leaf_counts)
    samples: np.ndarray | None = None

    @property
    def n_nodes(self) -> int:
        return int(self.feature.shape[0])

    def is_leaf(self) -> np.ndarray:
        return self.left == LEAF

    def depth(self) -> int:
        """Longest root-to-leaf edge count (the planner asks for it per strategy and dialect)."""
        return int(self.node_depths().max())

    def node_depths(self) -> np.ndarray:
        """Depth of every node (root 0), read-only: worked out once per tree, since the
        planner and the shapes ask for it again and again."""
        return self._depths

    @functools.cached_property
    def _depths(self) -> np.ndarray:
        return _depths_below(self.left, self.right, np.zeros(1, dtype=np.int64))

    def preorder(self) -> list[int]:
        """Node ids root first, left subtree before right (any node numbering)."""
        order: list[int] = []
        stack = [0]
        left, right = self.left.tolist(), self.right.tolist()
        while stack:
            node = stack.pop()
            order.append(node)
            if left[node] != LEAF:
                stack.append(right[node])
                stack.append(left[node])
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


def _depths_below(left: np.ndarray, right: np.ndarray, roots: np.ndarray,
                  base: np.ndarray | int = 0) -> np.ndarray:
    """Depth of every node under `roots` (each at depth 0), read-only: one numpy step per
    level, no per-node Python. Children are numbered from `base` (per node: several trees
    laid end to end, each numbering its own nodes from 0)."""
    depth = np.zeros(len(left), dtype=np.int64)
    frontier, level = roots, 0
    while frontier.size:
        depth[frontier] = level
        inner = frontier[left[frontier] != LEAF]
        offset = base if isinstance(base, int) else base[inner]
        frontier = np.concatenate((left[inner] + offset, right[inner] + offset))
        level += 1
    depth.flags.writeable = False  # shared by every caller
    return depth


@dataclass(frozen=True, eq=False)
class Forest:
    """A tree ensemble: trees, how their leaf values combine, and the model's input rules.

    `classes` holds the original labels (any type the library accepts) in the model's
    class order; it is None for a regressor. `accepts_missing` is False when the library
    refuses rows with missing values, in which case such rows get NULL scores.
    `refuses_float32_overflow` is True when the library refuses rows with infinite values
    or values beyond float32's range (it casts X to float32 and checks it); models that
    read X in float64 or accept infinities score those rows. `aggregation` defaults to
    the mean of the trees' values; `derived` lists category tests the trees may split on.
    """

    task: Task
    trees: tuple[Tree, ...]
    feature_names: tuple[str, ...]
    comparison: Comparison
    accepts_missing: bool
    classes: tuple | None = None
    source: str = ""  # what was ingested, for messages and manifests
    refuses_float32_overflow: bool = True
    aggregation: Aggregation = MEAN
    derived: tuple[CategoryTest, ...] = ()
    inputs: InputPlan | None = None  # a pipeline's preprocessing over raw columns
    _fingerprint: list = field(default_factory=list, repr=False)

    @property
    def n_features(self) -> int:
        return len(self.feature_names)

    @property
    def input_names(self) -> tuple[str, ...]:
        """Names of the columns the SQL reads: a pipeline's raw columns, else the features."""
        return self.inputs.columns if self.inputs is not None else self.feature_names

    @property
    def n_outputs(self) -> int:
        """Score columns: one probability per class, or one value."""
        if self.classes is not None and self.aggregation != MEAN:
            return len(self.classes)
        if self.task is Task.ANOMALY:
            return 2
        return int(self.trees[0].value.shape[1])

    @property
    def n_raw(self) -> int:
        """Sums over trees the outputs derive from (one for binary boosting)."""
        if self.aggregation.tree_output is not None:
            return len(self.aggregation.initial)
        return int(self.trees[0].value.shape[1])

    def trees_feeding(self, k: int) -> list[int]:
        """Indexes of the trees adding to raw output k, in tree order."""
        owner = self.aggregation.tree_output
        if owner is None:
            return list(range(len(self.trees)))
        return [t for t, o in enumerate(owner) if o == k]

    @property
    def n_nodes(self) -> int:
        return sum(t.n_nodes for t in self.trees)

    def node_depths(self) -> list[np.ndarray]:
        """Each tree's `Tree.node_depths`, worked out for every tree at once: one numpy step
        per level of the deepest tree, not per level of each tree (a fully grown forest of
        100 trees: a few numpy steps per level instead of a few hundred)."""
        pending = [tree for tree in self.trees if "_depths" not in vars(tree)]
        if pending:
            sizes = [tree.n_nodes for tree in pending]
            offsets = np.concatenate([[0], np.cumsum(sizes)[:-1]]).astype(np.int64)
            depths = _depths_below(np.concatenate([tree.left for tree in pending]),
                                   np.concatenate([tree.right for tree in pending]),
                                   offsets, np.repeat(offsets, sizes))
            for tree, offset, size in zip(pending, offsets.tolist(), sizes, strict=True):
                tree.__dict__["_depths"] = depths[offset:offset + size]  # its cached_property
        return [tree.node_depths() for tree in self.trees]

    def tree_depths(self) -> list[int]:
        """Each tree's depth (`Tree.depth`)."""
        return [int(depths.max()) for depths in self.node_depths()]

    def depth(self) -> int:
        """The deepest tree's depth."""
        return max(self.tree_depths())

    @functools.cached_property
    def starts(self) -> np.ndarray:
        """Where each tree's nodes begin, then where the last tree's end, with every tree's
        nodes laid end to end in tree order (as shapes lay out a forest at once)."""
        return np.cumsum([0, *(tree.n_nodes for tree in self.trees)])

    def by_tree(self, laid_out: np.ndarray) -> list[np.ndarray]:
        """Each tree's view of an array over every tree's nodes laid end to end."""
        return np.split(laid_out, self.starts[1:-1])

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
            if self.aggregation != MEAN or self.derived or not self.refuses_float32_overflow:
                header += (repr(self.aggregation), repr(self.derived),
                           self.refuses_float32_overflow)
            if self.inputs is not None:
                header += (repr(self.inputs),)
            digest.update(repr(header).encode())
            for tree in self.trees:
                for array in (tree.feature, tree.threshold, tree.left, tree.right,
                              tree.missing_left, tree.value):
                    digest.update(np.ascontiguousarray(array).tobytes())
            self._fingerprint.append(digest.hexdigest())
        return self._fingerprint[0]
