"""text_arrays with one set of node arrays per tree level, each named in its own stage.

Why (figures in benchmarks/README.md, ClickHouse shapes): ClickHouse parses a named
constant of the WITH clause again wherever it is visible, so text_arrays' whole-tree
arrays cost planning time per stage (12 s of 25 s at the default workload) and a fully
grown forest ran out of memory. A step only ever reads the nodes of one level, so here the
nodes are numbered breadth first (each level's nodes consecutive, a node's two children
next to each other) and every level has its own small arrays, defined by a WITH inside the
stage that walks that level:

    n = CASE WHEN n <= S THEN n
             ELSE left[n - S] + CASE WHEN xs[slot[n - S]] <= bound[n - S] THEN 0 ELSE 1 END
             END

where S counts the nodes of the levels above; each array is read once. A row whose tree
reached a leaf on an earlier level keeps its node (n <= S); a leaf on this level has
left = n - 1 and the undecided slot, so it keeps its node too. Everything else (the row
array, missing values, leaf values by position) is text_arrays'.

Profile keys: text_arrays' keys, and `constant_alias` over {value} and {name} (the arrays
named in each stage's WITH) or `arrays_at_each_use` (each array written where it is read,
which here is once: Spark).
"""

from __future__ import annotations

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.errors import UserError
from tree2sql.forest import LEAF, Forest, Tree
from tree2sql.strategies.base import Context, require_keys
from tree2sql.strategies.text_arrays import REQUIRED_KEYS, TextArrays


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

    def _layout(self, forest: Forest, t: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        if t not in self._layouts:
            tree = forest.trees[t]
            self._layouts[t] = (*breadth_first(tree), tree.node_depths())
        return self._layouts[t]

    def _check(self, profile: Profile) -> None:
        require_keys(profile, REQUIRED_KEYS, self.name)
        if "constant_alias" not in profile.raw and not profile.raw.get("arrays_at_each_use"):
            raise UserError(f"the {profile.name} profile has neither constant_alias nor "
                            f"arrays_at_each_use for the {self.name} shape",
                            "use another --strategy, or add one of the keys to the profile")

    def constants(self, ctx: Context) -> list[tuple[str, str]]:
        return []  # each stage names its own level's arrays

    def _level(self, ctx: Context, t: int, level: int) -> tuple[int, dict[str, np.ndarray]]:
        """Nodes above `level` (S), and the level's slot, bound and left-child arrays."""
        tree, k = ctx.forest.trees[t], len(ctx.features)
        order, position, depth = self._layout(ctx.forest, t)
        at = np.flatnonzero(depth[order] == level)  # consecutive positions
        nodes = order[at]
        leaf = tree.left[nodes] == LEAF
        goes_left = tree.missing_left[nodes] & ctx.forest.accepts_missing
        return int(at[0]), {
            "slot": np.where(leaf, 2 * k + 1, tree.feature[nodes] + 1 + np.where(goes_left, 0, k)),
            "bound": np.where(leaf, 0.0, ctx.bounds[t][nodes]),
            "left": np.where(leaf, at, position[np.where(leaf, 0, tree.left[nodes])] + 1),
        }

    def _walk_stage(self, ctx: Context, level: int, keep: list[str], source: str) -> str:
        p = ctx.profile
        named = "constant_alias" in p.raw  # else written where the step reads them (Spark)
        tree_level = self.top_levels + level - 1
        element = {"slot": p.raw["integer_type"], "bound": p.double_type,
                   "left": p.raw["integer_type"]}
        constants, steps = [], []
        for t, depth in enumerate(self._depths(ctx.forest)):
            n = self._name(ctx, "n", t)
            if depth <= tree_level:
                steps.append(n)
                continue
            above, arrays = self._level(ctx, t, tree_level)
            read = {}  # what -> the array where the step reads it
            for what, values in arrays.items():
                array = self._array(ctx, values, element[what])
                if named:
                    read[what] = self._name(ctx, what, t)
                    constants.append(p.raw["constant_alias"].format(value=array,
                                                                    name=read[what]))
                else:
                    read[what] = array
            i = f"{n} - {above}"
            value = self._index(ctx, ctx.prefix("xs"), self._index(ctx, read["slot"], i))
            bound, left = (self._index(ctx, read[what], i) for what in ("bound", "left"))
            steps.append(f"CASE WHEN {n} <= {above} THEN {n} ELSE {left} + "
                         f"CASE WHEN {value} <= {bound} THEN 0 ELSE 1 END END AS {n}")
        constants_clause = "WITH " + ",\n".join(constants) + "\n" if constants else ""
        return (constants_clause + "SELECT " + ",\n  ".join([*keep, *steps])
                + f"\nFROM {source}")

    def _parsed_elements(self, forest: Forest, profile: Profile) -> int:
        """Each level's three arrays are read once, by the stage that walks the level."""
        return 3 * forest.n_nodes if "constant_alias" in profile.raw else 0
