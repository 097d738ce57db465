"""Every tree stepped at once: one array of node positions per row, one map per level.

Why (figures in benchmarks/README.md, ClickHouse shapes): level_arrays writes one step per
tree and level, 1,200 for the default forest, and ClickHouse analyses every function of
every step: planning stayed above 10% of scoring however lean the step. Here a row carries
one array holding every tree's position, and a stage maps one step over it:

    ns = arrayMap(g -> right[g] - (xs[slot[g]] <= bound[g]), ns)

so the statement has one step per level, whatever the number of trees. The level's arrays
are the whole forest's, tree after tree (named in the stage's WITH where the profile has
`constant_alias`, as level_arrays does; else written where they are read, once each): a
tree's nodes on level k, breadth first, each split's two children side by side (left
first), right children stored as positions in the next level's forest-wide arrays.
Every tree walks every level down to the forest's depth: a leaf above it is carried down
as a node of its own on each level below (the undecided slot and itself as right child),
so no step tests for finished rows. The last level's right children
are the tree's own leaf numbers, which the leaf values are read at (`ns[t]`); summing the
trees in tree order is the compiler's, as for any shape.

The leaves carried down cost array elements and compile time: a forest whose leaves lie
far above its deepest level (a fully grown forest walks 9.5 entries per node) is left to
the next shape (`ENTRIES_PER_NODE`). The arrays, the row array and missing values are
text_arrays'.

Profile keys: text_arrays' keys, optionally `constant_alias`, and `array_map` over {name},
{body} and {array} (a map of `body` over `array` with `name` bound to each element).
"""

from __future__ import annotations

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.forest import LEAF, Forest, Tree
from tree2sql.strategies.base import (
    Context,
    LeafValue,
    Needs,
    array_from_numbers,
    require_keys,
)
from tree2sql.strategies.text_arrays import REQUIRED_KEYS, TextArrays

# Walk entries per node (splits, and leaves carried down) past which the shape gives way.
# Measured (benchmarks/README.md): the default benchmark forest walks 1.13 per node, the
# fully grown one 9.5, which compiled at 0.52 M nodes/s (the goal is 1 M) and peaked at
# 4.7 GiB; compile time grows with the entries, reaching the goal's limit near 2.
ENTRIES_PER_NODE = 2.0


def walk_entries(tree: Tree, depth: int) -> int:
    """Nodes tree walks through on levels 0 .. depth - 1: its splits, and each leaf once per
    level from its own down to depth - 1."""
    depths = tree.node_depths()
    leaf = tree.left == LEAF
    return int((~leaf).sum() + (depth - depths[leaf]).sum())


def level_layout(tree: Tree, depth: int, k_features: int, bounds: np.ndarray,
                 goes_left: np.ndarray) -> tuple[list[dict[str, np.ndarray]], np.ndarray]:
    """Per level 0 .. depth - 1, the tree's slot, bound and right arrays (right children as
    1-based positions among the tree's own nodes of the next level; on the last level, leaf
    numbers), and the leaf node ids in leaf-number order."""
    levels, frontier = [], np.zeros(1, dtype=np.int64)
    for _ in range(depth):
        split = tree.left[frontier] != LEAF
        counts = 1 + split
        right = np.cumsum(counts)
        below = np.repeat(frontier, counts)
        first = right[split] - 2  # 0-based place of each split's left child below
        below[first] = tree.left[frontier[split]]
        below[first + 1] = tree.right[frontier[split]]
        node = frontier[split]
        slot = np.full(len(frontier), 2 * k_features + 1, dtype=np.int64)
        slot[split] = tree.feature[node] + 1 + np.where(goes_left[node], 0, k_features)
        bound = np.zeros(len(frontier))
        bound[split] = bounds[node]
        levels.append({"slot": slot, "bound": bound, "right": right})
        frontier = below
    return levels, frontier


class ForestLevels(TextArrays):
    name = "forest_levels"
    summary = ("one array of every tree's node per row, stepped by one array map per level "
               "over forest-wide level arrays (ClickHouse)")

    def __init__(self) -> None:
        super().__init__(0)
        self._walk: tuple[list[dict[str, np.ndarray]], list[np.ndarray]] | None = None

    def _check(self, profile: Profile) -> None:
        require_keys(profile, (*REQUIRED_KEYS, "array_map"), self.name)

    def constants(self, ctx: Context) -> list[tuple[str, str]]:
        return []  # each stage names its own level's arrays

    def _forest_walk(self, ctx: Context) -> tuple[list[dict[str, np.ndarray]], list[np.ndarray]]:
        """Forest-wide slot, bound and right arrays per level, and each tree's leaves in
        leaf-number order; made once (every stage and every term reads them)."""
        if self._walk is None:
            forest, depth = ctx.forest, self.depth(ctx.forest)
            goes_left = [tree.missing_left & forest.accepts_missing for tree in forest.trees]
            layouts = [level_layout(tree, depth, len(ctx.features), ctx.bounds[t], goes_left[t])
                       for t, tree in enumerate(forest.trees)]
            levels = []
            for k in range(depth):
                pieces = [levels_of[k] for levels_of, _ in layouts]
                if k + 1 < depth:  # right children: positions in the next level, forest-wide
                    sizes = [len(levels_of[k + 1]["slot"]) for levels_of, _ in layouts]
                    starts = np.cumsum([0, *sizes[:-1]])
                    pieces = [{**piece, "right": piece["right"] + start}
                              for piece, start in zip(pieces, starts, strict=True)]
                levels.append({what: np.concatenate([piece[what] for piece in pieces])
                               for what in ("slot", "bound", "right")})
            self._walk = levels, [leaves for _, leaves in layouts]
        return self._walk

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        self._check(ctx.profile)
        p, trees = ctx.profile, len(ctx.forest.trees)
        xs, ns, g = ctx.prefix("xs"), ctx.prefix("ns"), ctx.prefix("g")
        levels, _ = self._forest_walk(ctx)
        # Each tree's one node on level 0, forest-wide; a forest of lone leaves is done.
        first = np.arange(1, trees + 1) if levels else np.ones(trees, dtype=np.int64)
        roots = array_from_numbers(p, first, p.raw["integer_type"])
        stages = [(ctx.prefix("walk0"), "SELECT " + ",\n  ".join(
            [*ctx.keys, ctx.ok, f"{self._row_array(ctx)} AS {xs}", f"{roots} AS {ns}"])
            + f"\nFROM {ctx.source}")]
        element = self._elements(p)
        for k, arrays in enumerate(levels):
            written = {what: array_from_numbers(p, values, element[what])
                       for what, values in arrays.items()}
            if "constant_alias" in p.raw:  # named in the stage's WITH
                names = {what: self._name(ctx, what, k) for what in arrays}
                named = "WITH " + ",\n".join(p.raw["constant_alias"].format(
                    value=written[what], name=names[what]) for what in arrays) + "\n"
            else:  # each array is read once: written where it is read
                names, named = written, ""
            value = self._index(ctx, xs, self._index(ctx, names["slot"], g))
            bound, right = (self._index(ctx, names[what], g) for what in ("bound", "right"))
            step = p.raw["array_map"].format(
                name=g, body=f"{right} - {p.indicator(f'{value} <= {bound}')}", array=ns)
            keep = [*ctx.keys, ctx.ok, *([xs] if k + 1 < len(levels) else [])]
            stages.append((ctx.prefix(f"walk{k + 1}"), f"{named}SELECT "
                           + ",\n  ".join([*keep, f"{step} AS {ns}"])
                           + f"\nFROM {stages[-1][0]}"))
        return stages

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        _, leaves = self._forest_walk(ctx)
        values = self._leaf_array(ctx, leaves[tree_index], np.ones(len(leaves[tree_index]), bool),
                                  leaf_value)
        return self._index(ctx, values, self._index(ctx, ctx.prefix("ns"), str(tree_index + 1)))

    @staticmethod
    def _poor_fit(forest: Forest, depth: int, entries: int) -> str | None:
        """Why the carried-down leaves make this forest a poor fit, or None."""
        if entries > ENTRIES_PER_NODE * forest.n_nodes:
            return (f"its leaves lie far above its deepest level: walking every tree to depth "
                    f"{depth} passes {entries} nodes for {forest.n_nodes}, slow to compile "
                    "and large to plan (benchmarks/README.md)")
        return None

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        self._check(profile)
        depth = self.depth(forest)
        entries = sum(walk_entries(tree, depth) for tree in forest.trees)
        leaves = sum(int((tree.left == LEAF).sum()) for tree in forest.trees)
        outputs = max(1, forest.n_outputs)
        size = 45 * (3 * entries + outputs * leaves) + 200 * depth \
            + 120 * len(forest.trees) * outputs
        elements = 40 * forest.n_features + 40 * depth + 12 * len(forest.trees) * outputs
        return Needs(size, case_depth=1, expression_depth=12,
                     select_columns=forest.n_features + 4, ast_elements=elements,
                     constant_elements=3 * entries + outputs * leaves,
                     unsuitable=self._poor_fit(forest, depth, entries))
