"""text_arrays with one set of node arrays per tree level, each named in its own stage.

Why (figures in benchmarks/README.md, ClickHouse shapes): ClickHouse parses a named
constant of the WITH clause again wherever it is visible, so text_arrays' whole-tree
arrays cost planning time in every stage (8-12 s of 20-27 s at the default workload) and a fully
grown forest ran out of memory. A step only ever reads the nodes of one level, so here the
nodes are numbered breadth first (each level's nodes consecutive, a node's two children
next to each other) and every level has its own small arrays, defined by a WITH inside the
stage that walks that level. A tree's column holds its node's position less the nodes of
the levels above the one it walks next (S before this level, T before the next), so a
level's arrays are read at the column itself and its right children are stored less T:

    r = CASE WHEN r <= 0 THEN r - (T - S) ELSE right[r] - (xs[slot[r]] <= bound[r]) END

A left child sits just before its right sibling; each array is read once. On a tree's last
level the step gives positions (right children stored as they are, finished rows `r + S`),
which the leaf values are read at. A row whose tree
reached a leaf on an earlier level keeps its node (r <= 0, moved to the next level's base);
a tree with no leaf above this level has no such row, so its step is the ELSE branch alone.
A leaf on this level is its own right child with the undecided slot, so it keeps its node
too. Each piece the step leaves out is planning time: ClickHouse analyses every function
of every step (the `- S` of each array read and the test for finished rows cost 15-20%
of it; measured, benchmarks/README.md). The comparison is its own 1 or 0 (profile key
`indicator`), and the arrays of doubles are not Nullable (`array_double_type`), so nothing
in the walk is: a Nullable comparison made every later step Nullable and slower. The
arrays themselves, the row array, missing values and leaf values by position are
text_arrays'.

Profile keys: text_arrays' keys and `constant_alias` over {value} and {name}. Spark, which
has no named constants, ran this layout with each array written where it is read at half
text_arrays' speed (benchmarks/README.md), so it keeps text_arrays.
"""

from __future__ import annotations

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.forest import LEAF, Forest, Tree
from tree2sql.strategies.base import Context, array_from_texts, require_keys
from tree2sql.strategies.text_arrays import (
    REQUIRED_KEYS,
    TOP_LEVELS,
    TextArrays,
    stage_constants,
)


def breadth_first(tree: Tree) -> tuple[np.ndarray, np.ndarray]:
    """(order, position): order[i] is the node at position i, level by level, each split's
    two children side by side (left first); position inverts it."""
    levels, frontier = [], np.zeros(1, dtype=np.int64)
    while frontier.size:
        levels.append(frontier)
        inner = frontier[tree.left[frontier] != LEAF]
        frontier = np.column_stack((tree.left[inner], tree.right[inner])).ravel()
    order = np.concatenate(levels)
    position = np.empty_like(order)
    position[order] = np.arange(len(order))
    return order, position


class LevelArrays(TextArrays):
    name = "level_arrays"
    summary = ("per-level node arrays, breadth first, each named in the stage that walks "
               "its level (ClickHouse)")

    def __init__(self, top_levels: int = TOP_LEVELS) -> None:
        super().__init__(top_levels)
        self._texts: list[dict[str, list[str]]] | None = None  # by tree: see _levels
        self._shallowest: dict[int, int] = {}  # by tree: see _shallowest_leaf
        self._level_starts: dict[int, np.ndarray] = {}  # by tree: see _starts

    def _layout(self, forest: Forest, t: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        if t not in self._layouts:
            tree = forest.trees[t]
            self._layouts[t] = (*breadth_first(tree), tree.node_depths())
        return self._layouts[t]

    def _check(self, profile: Profile) -> None:
        require_keys(profile, (*REQUIRED_KEYS, "constant_alias"), self.name)

    def constants(self, ctx: Context) -> list[tuple[str, str]]:
        return []  # each stage names its own level's arrays

    def _starts(self, forest: Forest, t: int) -> np.ndarray:
        """Where each level starts among tree t's breadth-first positions (one more entry
        than levels: the end); kept, since every stage asks."""
        if t not in self._level_starts:
            order, _, depth = self._layout(forest, t)
            self._level_starts[t] = np.searchsorted(depth[order],
                                                    np.arange(int(depth.max()) + 2))
        return self._level_starts[t]

    def _levels(self, ctx: Context, t: int) -> tuple[np.ndarray, dict[str, list[str]]]:
        """`_starts` of tree t, and the texts of its node arrays by position (written once
        for the forest; a level's arrays are slices)."""
        if self._texts is None:  # every stage reads slices of them
            self._texts = self._column_texts(ctx, range(len(ctx.forest.trees)))
        return self._starts(ctx.forest, t), self._texts[t]

    def _node_columns(self, ctx: Context, t: int) -> dict[str, np.ndarray]:
        """text_arrays' arrays in breadth-first order, each right child less the nodes
        above its level (what the walk's column holds once it is there), except on the
        tree's last level walked: the walk ends at positions, which the leaf values use."""
        columns = super()._node_columns(ctx, t)
        order, _, depth = self._layout(ctx.forest, t)
        below = depth[order] + 1
        base = np.where(below < self._depths(ctx.forest)[t], self._starts(ctx.forest, t)[below], 0)
        columns["right"] = columns["right"] - base
        return columns

    def _start_base(self, ctx: Context, t: int) -> int:
        """Nodes above the first level walked; 0 for a tree the walk never steps."""
        if self._depths(ctx.forest)[t] <= self.top_levels:
            return 0
        return int(self._starts(ctx.forest, t)[self.top_levels])

    def _walk_stage(self, ctx: Context, level: int, keep: list[str], source: str) -> str:
        p = ctx.profile
        tree_level = self.top_levels + level - 1
        element = self._elements(p)
        constants, steps = [], []
        for t, depth in enumerate(self._depths(ctx.forest)):
            n = self._name(ctx, "n", t)
            if depth <= tree_level:
                steps.append(n)
                continue
            starts, texts = self._levels(ctx, t)
            above, end = int(starts[tree_level]), int(starts[tree_level + 1])
            read = {what: self._name(ctx, what, t) for what in texts}
            constants += [(read[what], array_from_texts(p, items[above:end], element[what]))
                          for what, items in texts.items()]
            value = self._index(ctx, ctx.prefix("xs"), self._index(ctx, read["slot"], n))
            bound, right = (self._index(ctx, read[what], n) for what in ("bound", "right"))
            step = f"{right} - {p.indicator(f'{value} <= {bound}')}"
            if self._shallowest_leaf(ctx.forest, t) < tree_level:  # some rows are done
                done = f"{n} + {above}" if tree_level == depth - 1 else f"{n} - {end - above}"
                step = f"CASE WHEN {n} <= 0 THEN {done} ELSE {step} END"
            steps.append(f"{step} AS {n}")
        return (stage_constants(p, constants) + "SELECT " + ",\n  ".join([*keep, *steps])
                + f"\nFROM {source}")

    def _shallowest_leaf(self, forest: Forest, t: int) -> int:
        """Depth of tree t's shallowest leaf (asked once per level: kept)."""
        if t not in self._shallowest:
            _, _, depth = self._layout(forest, t)
            self._shallowest[t] = int(depth[forest.trees[t].left == LEAF].min())
        return self._shallowest[t]

    def _parsed_elements(self, forest: Forest, profile: Profile) -> int:
        """Each level's three arrays are read once, by the stage that walks the level."""
        return 3 * forest.n_nodes
