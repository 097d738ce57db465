"""text_arrays with one set of node arrays per tree level, each named in its own stage.

Why (figures in benchmarks/README.md, ClickHouse shapes): ClickHouse parses a named
constant of the WITH clause again wherever it is visible, so text_arrays' whole-tree
arrays cost planning time in every stage (8-12 s of 20-27 s at the default workload) and a fully
grown forest ran out of memory. A step only ever reads the nodes of one level, so here the
nodes are numbered breadth first (each level's nodes consecutive, a node's two children
next to each other) and every level has its own small arrays, defined by a WITH inside the
stage that walks that level:

    n = CASE WHEN n <= S THEN n
             ELSE right[n - S] - CASE WHEN xs[slot[n - S]] <= bound[n - S] THEN 1 ELSE 0 END
             END

where S counts the nodes of the levels above, and a left child sits just before its right
sibling; each array is read once. A row whose tree reached a leaf on an earlier level keeps
its node (n <= S); a leaf on this level is its own right child with the undecided slot, so
it keeps its node too. The arrays themselves, the row array, missing values and leaf values
by position are text_arrays'.

Profile keys: text_arrays' keys and `constant_alias` over {value} and {name}. Spark, which
has no named constants, ran this layout with each array written where it is read at half
text_arrays' speed (benchmarks/README.md), so it keeps text_arrays.
"""

from __future__ import annotations

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.forest import LEAF, Forest, Tree
from tree2sql.strategies.base import Context, array_from_texts, require_keys
from tree2sql.strategies.text_arrays import REQUIRED_KEYS, TOP_LEVELS, TextArrays


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

    def _layout(self, forest: Forest, t: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        if t not in self._layouts:
            tree = forest.trees[t]
            self._layouts[t] = (*breadth_first(tree), tree.node_depths())
        return self._layouts[t]

    def _check(self, profile: Profile) -> None:
        require_keys(profile, (*REQUIRED_KEYS, "constant_alias"), self.name)

    def constants(self, ctx: Context) -> list[tuple[str, str]]:
        return []  # each stage names its own level's arrays

    def _levels(self, ctx: Context, t: int) -> tuple[np.ndarray, dict[str, list[str]]]:
        """Where each level starts among tree t's breadth-first positions, and the texts of
        its node arrays by position (written once for the forest; a level's arrays are
        slices)."""
        if self._texts is None:  # every stage reads slices of them
            self._texts = self._column_texts(ctx, range(len(ctx.forest.trees)))
        order, _, depth = self._layout(ctx.forest, t)
        starts = np.searchsorted(depth[order], np.arange(int(depth.max()) + 2))
        return starts, self._texts[t]

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
            constants += [p.raw["constant_alias"].format(
                value=array_from_texts(p, items[above:end], element[what]), name=read[what])
                for what, items in texts.items()]
            i = f"{n} - {above}"
            value = self._index(ctx, ctx.prefix("xs"), self._index(ctx, read["slot"], i))
            bound, right = (self._index(ctx, read[what], i) for what in ("bound", "right"))
            steps.append(f"CASE WHEN {n} <= {above} THEN {n} ELSE {right} - "
                         f"CASE WHEN {value} <= {bound} THEN 1 ELSE 0 END END AS {n}")
        named = "WITH " + ",\n".join(constants) + "\n" if constants else ""
        return named + "SELECT " + ",\n  ".join([*keep, *steps]) + f"\nFROM {source}"

    def _parsed_elements(self, forest: Forest, profile: Profile) -> int:
        """Each level's three arrays are read once, by the stage that walks the level."""
        return 3 * forest.n_nodes
