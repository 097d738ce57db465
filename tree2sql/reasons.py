"""Reason codes: per row, the K features that moved the score most, computed in SQL.

Path attribution (Saabas, 2014): walking a row down a tree, each split changes the node
value from the parent's to the child's; that change is credited to the split's feature.
A leaf's value is then the root's value plus the sum of its path's credits (exactly, in
real arithmetic), and a forest's score is the mean root value plus each feature's credit
averaged over the trees. Per leaf the credit for feature f is one more literal, so the
SQL reuses the strategy seam: `tree_term(ctx, tree, leaf -> credit_f(leaf))`.

What the credits explain (one output, chosen for simplicity): a regressor's value; a
binary classifier's probability of its second class (classes_[1]); a multiclass model's
probability of the predicted class. Reasons rank features by |credit|, largest first;
equal magnitudes go to the feature that comes first in the model's feature order.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.errors import UserError
from tree2sql.forest import LEAF, Forest, Task, Tree

EXPLAINS = ("regressors: the predicted value; binary classifiers: the probability of the "
            "second class; multiclass: the probability of the predicted class")
Stage = tuple[str, str]


def reason_column_names(prefix: str, k: int) -> list[str]:
    """`<prefix>reason_<i>` (feature name) and `<prefix>reason_<i>_contribution`, i = 1..k."""
    return [name for i in range(1, k + 1)
            for name in (f"{prefix}reason_{i}", f"{prefix}reason_{i}_contribution")]


def check_reasons(forest: Forest, k: int, majority: bool) -> None:
    """Refuse what path attribution here does not cover (yet), naming the way out."""
    if not forest.aggregation.mean or forest.task is Task.ANOMALY or forest.derived:
        raise UserError(f"reason codes are not available for {forest.source or 'this model'}",
                        "use --reasons with random forests, extra-trees or decision trees, "
                        "or drop --reasons")
    if getattr(forest, "inputs", None) is not None:
        raise UserError("reason codes are not available for pipelines yet (their credits "
                        "would name the encoded model inputs, not the table's columns)",
                        "compile the fitted forest itself with --reasons, or drop --reasons")
    if majority:
        raise UserError("reason codes explain averaged probabilities, not majority votes",
                        "drop --combine majority, or drop --reasons")
    used = len(forest.used_features())
    if k < 1 or k > used:
        raise UserError(f"--reasons {k} asks for {k} reasons but the model splits on "
                        f"{used} features", f"use a number from 1 to {used}")


def explained_outputs(forest: Forest) -> list[int]:
    """Value columns whose credits are computed: the one explained, or every class when
    the explained class is the predicted one (multiclass)."""
    if not forest.is_classifier:
        return [0]
    if forest.n_outputs == 2:
        return [1]
    return list(range(forest.n_outputs))


def path_credits(tree: Tree, features: Sequence[int]) -> np.ndarray:
    """(n_nodes, len(features), n_outputs): per node, the sum over the splits on the path
    from the root of value(child) - value(parent), by the split's feature.

    Level by level in numpy (no recursion, no per-node Python), adding root to leaf.
    """
    column = np.full(max(features, default=0) + 1, -1, dtype=np.int64)
    column[list(features)] = np.arange(len(features))
    credits = np.zeros((tree.n_nodes, len(features), tree.value.shape[1]))
    frontier = np.zeros(1, dtype=np.int64)
    while True:
        parents = frontier[tree.left[frontier] != LEAF]
        if parents.size == 0:
            return credits
        for children in (tree.left[parents], tree.right[parents]):
            credits[children] = credits[parents]
            delta = tree.value[children] - tree.value[parents]
            credits[children, column[tree.feature[parents]]] += delta
        frontier = np.concatenate((tree.left[parents], tree.right[parents]))


def baseline(forest: Forest, output: int) -> float:
    """The mean root value: the score before any split, to which the credits add up."""
    total = 0.0
    for tree in forest.trees:
        total += float(tree.value[0, output])
    return total / len(forest.trees)


class ReasonSql:
    """SQL pieces for reason codes; the compiler places them in its query.

    1. `leaf_stage`: each tree's leaf id once per row (the strategy's `tree_term` with the
       node id as the leaf value), so no tree is walked again per feature.
    2. `terms`: per (feature, explained output), per tree in tree order, the tree's credit
       looked up by leaf id; trees that never split on the feature add an exact 0.
    3. `credit_items`: the sums divided by the number of trees, NULL where the score is NULL.
    4. `stages`: pick the explained output, rank the credits by magnitude (a row-local
       count of the features that beat each one: no row identity, no join), and
       `output_items`: the K (name, credit) pairs.

    Measured on DuckDB (50 trees of depth 8, 30 features, 50k rows): the leaf-id lookup
    took 8.4 s against 23.3 s for re-walking each tree per feature with nested CASE;
    the row-local ranking 1.9 s against 2.2 s for unpivot + ROW_NUMBER (100k rows, K 3).
    """

    def __init__(self, forest: Forest, profile: Profile, internal: Callable[[str], str],
                 k: int) -> None:
        self.forest, self.profile, self.internal, self.k = forest, profile, internal, k
        self.features = forest.used_features()
        self.outputs = explained_outputs(forest)
        # Stages read many times per row: kept whole where the profile says how (see
        # `cte_materialized` in dialects/*.toml), with the compiler's scores stage.
        self.fenced = {internal(n) for n in ("rc_leaf_ids", "rc_credits", "rc_ranked")}

    def _credit(self, i: int, j: int) -> str:
        return self.internal(f"rc_c{i}_{j}")

    def leaf_stage(self, source: str, tree_term: Callable[[int, Callable[[int], str]], str]
                   ) -> Stage:
        """Each tree's leaf id, once per row (`rc_leaf<t>`), for the credit lookups."""
        items = [f"{tree_term(t, str)} AS {self.internal(f'rc_leaf{t}')}"
                 for t, tree in enumerate(self.forest.trees) if tree.n_nodes > 1]
        return (self.internal("rc_leaf_ids"), "SELECT *,\n  " + ",\n  ".join(items)
                + f"\nFROM {source}")

    def terms(self) -> list[list[str]]:
        """Per (feature, explained output), per tree in tree order, the tree's credit."""
        double, n_out = self.profile.double, len(self.outputs)
        terms: list[list[str]] = [[] for _ in range(len(self.features) * n_out)]
        zero = double(0.0)
        for t, tree in enumerate(self.forest.trees):
            splits = set(tree.feature[tree.left != LEAF].tolist())
            credits = path_credits(tree, self.features) if splits else None
            leaves = np.flatnonzero(tree.left == LEAF)
            for i, f in enumerate(self.features):
                for jj, j in enumerate(self.outputs):
                    terms[i * n_out + jj].append(
                        self._lookup(t, leaves, credits[leaves, i, j]) if f in splits
                        else zero)
        return terms

    def _lookup(self, t: int, leaves: np.ndarray, values: np.ndarray) -> str:
        """A flat CASE over the leaf id: leaves in id order, runs of equal credit merged.

        scikit-learn numbers nodes depth first, so a subtree without a split on the
        feature is one run: a few branches instead of one per leaf, and no nesting.
        """
        literals = [self.profile.double(float(v)) for v in values]
        starts = [k for k in range(1, len(literals)) if literals[k] != literals[k - 1]]
        if not starts:
            return literals[0]
        leaf = self.internal(f"rc_leaf{t}")
        branches = [f"WHEN {leaf} < {int(leaves[b])} THEN {literals[a]}"
                    for a, b in zip([0, *starts[:-1]], starts, strict=True)]
        return f"CASE {' '.join(branches)} ELSE {literals[starts[-1]]} END"

    def credit_items(self, sums: list[list[str]], ok: str) -> list[str]:
        """`(sum) / n_trees AS rc_c<i>_<j>` where ok = 1 (else NULL), as the scores divide."""
        divisor, n_out = self.profile.double(len(self.forest.trees)), len(self.outputs)
        return [f"{self.profile.guarded(ok, f'({s[-1]}) / {divisor}')} AS "
                f"{self._credit(index // n_out, self.outputs[index % n_out])}"
                for index, s in enumerate(sums)]

    def stages(self, source: str, pick: Callable[[list[str]], str]) -> list[Stage]:
        """From `source` (credits per explained output) to ranked credits `rc_c<i>`, `rc_r<i>`.

        `pick(per_class)` is the compiler's argmax over the probabilities returning the
        predicted class's entry of `per_class`, for the multiclass case.
        """
        c = [self.internal(f"rc_c{i}") for i in range(len(self.features))]
        a = [self.internal(f"rc_a{i}") for i in range(len(self.features))]
        chosen = []
        for i in range(len(self.features)):
            per_output = [self._credit(i, j) for j in self.outputs]
            value = per_output[0] if len(per_output) == 1 else pick(per_output)
            chosen += [f"{value} AS {c[i]}", f"ABS({value}) AS {a[i]}"]
        ranks = []
        for i in range(len(self.features)):
            beaten_by = [f"CASE WHEN {a[g]} {'>=' if g < i else '>'} {a[i]} THEN 1 ELSE 0 END"
                         for g in range(len(self.features)) if g != i]
            ranks.append(" + ".join(["1", *beaten_by]) + f" AS {self.internal(f'rc_r{i}')}")
        credited, ranked = self.internal("rc_credits"), self.internal("rc_ranked")
        return [(credited, "SELECT *,\n  " + ",\n  ".join(chosen) + f"\nFROM {source}"),
                (ranked, "SELECT *,\n  " + ",\n  ".join(ranks) + f"\nFROM {credited}")]

    def output_items(self, names: list[str]) -> list[str]:
        """The K (feature name, credit) pairs as `expr AS "user name"`, NULL with the score."""
        quote, string = self.profile.quote, self.profile.string
        c0, items = self.internal("rc_c0"), []
        labels = [string(self.forest.feature_names[f]) for f in self.features]
        for k in range(1, self.k + 1):
            for column, what in ((names[2 * k - 2], labels),
                                 (names[2 * k - 1], [self.internal(f"rc_c{i}")
                                                     for i in range(len(self.features))])):
                branches = " ".join(f"WHEN {self.internal(f'rc_r{i}')} = {k} THEN {what[i]}"
                                    for i in range(len(self.features)))
                items.append(f"CASE WHEN {c0} IS NULL THEN NULL {branches} END AS "
                             f"{quote(column)}")
        return items
