"""Each tree as one nested CASE expression over the feature columns.

The plainest shape: readable, portable to every dialect, and exact. It costs one branch per
node visited per row; engines that evaluate CASE per vector pay per node instead (see
benchmarks/README.md), which is why other strategies exist.
"""

from __future__ import annotations

import math

import numpy as np

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


class SendsRight(str):
    """A condition that sends the row right, written where missing values go left:
    `CASE WHEN x > b THEN right ELSE left END` sends NULL to the ELSE branch (a NULL
    condition is not true; SQL standard, three-valued logic), so such a split needs no
    `OR x IS NULL` test of its own."""


def split_conditions(ctx: Context, tree_index: int,
                     nodes: list[int] | None = None) -> list[str | None]:
    """Per node: the SQL condition sending a row left (a `SendsRight` one sends it right),
    or ALWAYS_LEFT / ALWAYS_RIGHT.

    Rows with a missing value follow the model's missing direction; where the model
    cannot take missing values the compiler has already given such rows NULL scores.
    `nodes` limits the work to those split nodes (the others stay None).
    """
    tree: Tree = ctx.forest.trees[tree_index]
    routes_missing = ctx.forest.accepts_missing
    conditions: list[str | None] = [None] * tree.n_nodes
    if nodes is None:
        nodes = (tree.left != LEAF).nonzero()[0].tolist()
    bound = ctx.bounds[tree_index][nodes].tolist()
    # One bulk pass for every bound written as a literal (all but the infinite ones).
    written = [b for b in bound if not math.isinf(b)]
    literals = iter(ctx.profile.doubles(np.array(written, dtype=np.float64)))
    feature, missing = tree.feature.tolist(), tree.missing_left.tolist()
    for node, b in zip(nodes, bound, strict=True):
        x = ctx.features[feature[node]]
        missing_left = routes_missing and bool(missing[node])
        if b == math.inf:
            conditions[node] = ALWAYS_LEFT if missing_left or not routes_missing \
                else f"{x} IS NOT NULL"
        elif b == -math.inf:
            conditions[node] = f"{x} IS NULL" if missing_left else ALWAYS_RIGHT
        elif missing_left:
            conditions[node] = SendsRight(f"{x} > {next(literals)}")
        else:
            conditions[node] = f"{x} <= {next(literals)}"
    return conditions


def nested_case(tree: Tree, conditions: list[str | None], leaf_value: LeafValue,
                root: int = 0, levels: int | None = None,
                children: tuple[list[int], list[int]] | None = None) -> str:
    """Render a tree (or its top `levels` below `root`) without recursion.

    Fully grown trees can be thousands deep. A leaf, or a node `levels` below `root`, ends
    its branch with `leaf_value(node)`; the depth-staged and array shapes use the cut to
    emit the node id reached. `children`: the tree's left and right as lists, for callers
    that render one tree from many roots.
    """
    return CaseText(tree, conditions, root, levels, children).render(leaf_value)


class CaseText:
    """A tree's nested CASE with holes for its leaf values: the walk is done once, and
    each output (class, leaf id) only fills the holes."""

    def __init__(self, tree: Tree, conditions: list[str | None], root: int = 0,
                 levels: int | None = None,
                 children: tuple[list[int], list[int]] | None = None) -> None:
        left, right = children or (tree.left.tolist(), tree.right.tolist())
        depth_limit = -1 if levels is None else levels
        pieces: list[str] = []
        holes: list[tuple[int, int]] = []  # (index in pieces, node whose value goes there)
        # Items are pieces of text, or (node, level) pairs still to render.
        stack: list[tuple[int, int] | str] = [(root, 0)]
        pop, push, extend = stack.pop, stack.append, stack.extend
        while stack:
            item = pop()
            if item.__class__ is str:
                pieces.append(item)
                continue
            node, level = item
            if left[node] == LEAF or level == depth_limit:
                holes.append((len(pieces), node))
                pieces.append("")
                continue
            condition = conditions[node]
            if condition == ALWAYS_LEFT:
                push((left[node], level + 1))
            elif condition == ALWAYS_RIGHT:
                push((right[node], level + 1))
            else:
                pieces.append(f"CASE WHEN {condition} THEN ")
                then, other = left[node], right[node]
                if condition.__class__ is SendsRight:
                    then, other = other, then
                extend((" END", (other, level + 1), " ELSE ", (then, level + 1)))
        self.pieces, self.holes = pieces, holes

    def render(self, leaf_value: LeafValue) -> str:
        out = self.pieces.copy()
        for index, node in self.holes:
            out[index] = leaf_value(node)
        return "".join(out)


class NestedCase(Strategy):
    name = "nested_case"
    summary = "one nested CASE expression per tree"

    def __init__(self) -> None:
        self._cases: dict[int, CaseText] = {}

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        if tree_index not in self._cases:
            tree = ctx.forest.trees[tree_index]
            self._cases[tree_index] = CaseText(tree, split_conditions(ctx, tree_index))
        return self._cases[tree_index].render(leaf_value)

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
