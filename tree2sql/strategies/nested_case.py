"""Each tree as one nested CASE expression over the feature columns.

The plainest shape: readable, portable to every dialect, and exact. It costs one branch per
node visited per row; engines that evaluate CASE per vector pay per node instead (see
benchmarks/README.md), which is why other strategies exist.
"""

from __future__ import annotations

import math

from tree2sql.dialects import Profile
from tree2sql.forest import LEAF, Forest, Tree
from tree2sql.strategies.base import (
    Context,
    LeafValue,
    Needs,
    Strategy,
    feature_bytes,
    literal_bytes,
)

ALWAYS_LEFT = "left"
ALWAYS_RIGHT = "right"


def split_conditions(ctx: Context, tree_index: int,
                     nodes: list[int] | None = None) -> list[str | None]:
    """Per node: the SQL condition sending a row left, or ALWAYS_LEFT / ALWAYS_RIGHT.

    Rows with a missing value follow the model's missing direction; where the model
    cannot take missing values the compiler has already given such rows NULL scores.
    `nodes` limits the work to those split nodes (the others stay None).
    """
    tree: Tree = ctx.forest.trees[tree_index]
    bound = ctx.bounds[tree_index]
    routes_missing = ctx.forest.accepts_missing
    conditions: list[str | None] = [None] * tree.n_nodes
    if nodes is None:
        nodes = (tree.left != LEAF).nonzero()[0].tolist()
    for node in nodes:
        x = ctx.features[tree.feature[node]]
        missing_left = routes_missing and bool(tree.missing_left[node])
        b = float(bound[node])
        if b == math.inf:
            conditions[node] = ALWAYS_LEFT if missing_left or not routes_missing \
                else f"{x} IS NOT NULL"
        elif b == -math.inf:
            conditions[node] = f"{x} IS NULL" if missing_left else ALWAYS_RIGHT
        elif missing_left:
            conditions[node] = f"({x} <= {ctx.profile.double(b)} OR {x} IS NULL)"
        else:
            conditions[node] = f"{x} <= {ctx.profile.double(b)}"
    return conditions


def nested_case(tree: Tree, conditions: list[str | None], leaf_value: LeafValue,
                root: int = 0, levels: int | None = None) -> str:
    """Render a tree (or its top `levels` below `root`) without recursion.

    Fully grown trees can be thousands deep. A leaf, or a node `levels` below `root`, ends
    its branch with `leaf_value(node)`; the depth-staged and array shapes use the cut to
    emit the node id reached.
    """
    left, right = tree.left, tree.right
    out: list[str] = []
    stack: list[tuple[int, int] | str] = [(root, 0)]
    while stack:
        item = stack.pop()
        if isinstance(item, str):
            out.append(item)
            continue
        node, level = item
        if left[node] == LEAF or level == levels:
            out.append(leaf_value(node))
            continue
        condition = conditions[node]
        if condition == ALWAYS_LEFT:
            stack.append((int(left[node]), level + 1))
        elif condition == ALWAYS_RIGHT:
            stack.append((int(right[node]), level + 1))
        else:
            out.append(f"CASE WHEN {condition} THEN ")
            stack.extend((" END", (int(right[node]), level + 1), " ELSE ",
                          (int(left[node]), level + 1)))
    return "".join(out)


class NestedCase(Strategy):
    name = "nested_case"
    summary = "one nested CASE expression per tree"

    def __init__(self) -> None:
        self._conditions: dict[int, list[str | None]] = {}

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        if tree_index not in self._conditions:
            self._conditions[tree_index] = split_conditions(ctx, tree_index)
        return nested_case(ctx.forest.trees[tree_index], self._conditions[tree_index],
                           leaf_value)

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        """Every node written once per output; CASE nests as deep as the deepest tree."""
        internal = sum(int((tree.left != LEAF).sum()) for tree in forest.trees)
        leaves = forest.n_nodes - internal
        per_output = (internal * (50 + 2 * feature_bytes(profile, forest)
                                  + literal_bytes(profile))
                      + leaves * literal_bytes(profile) + 8 * len(forest.trees))
        depth = max(tree.depth() for tree in forest.trees)
        return Needs(per_output * forest.n_outputs + 200 * forest.n_features + 4000,
                     case_depth=depth, expression_depth=2 * depth + 6,
                     select_columns=forest.n_features + 4)
