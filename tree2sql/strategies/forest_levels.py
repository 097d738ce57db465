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
A leaf ends the walk at minus its number (the tree's own leaf numbers, which the leaf
values are read at: `-ns[t]`); summing the trees in tree order is the compiler's, as for
any shape. Rows reach leaves on different levels, which a level's step must then keep:

* leaves above the forest's last level are carried down, each as a node of its own on
  every level below (the undecided slot, itself as right child), so that no step tests for
  finished rows; this costs array elements and compile time, so it is done while the walk
  passes at most `ENTRIES_PER_NODE` entries per node (the default benchmark forest: 1.13);
* past that (a fully grown forest walks 9.5 per node carried), a leaf sends its row to
  minus its number at once, and each level below the forest's shallowest leaf keeps such
  rows: `CASE WHEN g < 0 THEN g ELSE <step> END`. That test cost 15% of scoring on the
  default forest (prototype), 5% on the fully grown one, whose carried leaves made a
  statement five times as long (benchmarks/README.md).

The arrays, the row array and missing values are text_arrays'.

Profile keys: text_arrays' keys, optionally `constant_alias`, and `array_map` over {name},
{body} and {array} (a map of `body` over `array` with `name` bound to each element).
"""

from __future__ import annotations

from typing import NamedTuple

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
from tree2sql.strategies.text_arrays import REQUIRED_KEYS, TextArrays, stage_constants

# Walk entries per node (splits, and leaves carried down) up to which leaves are carried.
# Measured (benchmarks/README.md): the default benchmark forest walks 1.13 per node; the
# fully grown one, 9.5, compiled at 0.52 M nodes/s (the goal is 1 M) into a 37 MB
# statement and peaked at 4.7 GiB, against 6.9 MB and 2.4 GiB with finished rows kept.
ENTRIES_PER_NODE = 2.0


def walk_entries(tree: Tree, depth: int) -> int:
    """Nodes tree walks through on levels 0 .. depth - 1 when its leaves are carried down:
    its splits, and each leaf once per level from its own down to depth - 1."""
    depths = tree.node_depths()
    leaf = tree.left == LEAF
    return int((~leaf).sum() + (depth - depths[leaf]).sum())


def forest_layout(forest: Forest, depth: int, k_features: int, bounds: list[np.ndarray],
                  carry: bool) -> tuple[list[dict[str, np.ndarray]], list[np.ndarray]]:
    """Per level 0 .. depth - 1, the forest-wide slot, bound and right arrays (every tree's
    nodes on the level, tree after tree), and each tree's leaf node ids by leaf number
    (1-based). A right child is its 1-based position among the next level's nodes; a leaf,
    where the walk ends, is minus its number. A leaf above the last level is `carry`-ied
    down (a node of each level below, its own right child), else it sends the row to
    minus its number at once. Leaves are numbered as the walk reaches them, a split's right
    leaf just before its left one (so that right - 1 is left). All trees are laid out
    together, one numpy pass per level (a pass per tree and level was most of compiling)."""
    trees = forest.trees
    sizes = np.array([tree.n_nodes for tree in trees])
    start = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    owner = np.repeat(np.arange(len(trees)), sizes)  # tree of each stacked node id

    def stacked(what: str) -> np.ndarray:
        return np.concatenate([getattr(tree, what) for tree in trees])

    leaf = stacked("left") == LEAF
    left = np.where(leaf, 0, stacked("left") + start[owner])
    right_child = np.where(leaf, 0, stacked("right") + start[owner])
    slot_of = np.where(leaf, 2 * k_features + 1, stacked("feature") + 1
                       + np.where(stacked("missing_left") & forest.accepts_missing,
                                  0, k_features))
    bound_of = np.where(leaf, 0.0, np.concatenate(bounds))
    levels, frontier = [], start.copy()
    reached_nodes, reached_numbers = [], []
    numbered = np.zeros(len(trees), dtype=np.int64)  # leaves numbered so far, by tree
    for k in range(depth):
        split = ~leaf[frontier]
        ends = (k + 1 == depth) | (leaf[frontier] & ~np.bool_(carry))  # a leaf to the right
        below = np.where(ends, 0, 1 + split)  # places taken on the next level
        right = np.cumsum(below)
        taken = np.where(ends, 1 + split, 0)  # leaf numbers taken, by entry
        tree = owner[frontier]
        within = np.cumsum(taken)
        first_of_tree = np.zeros(len(trees), dtype=np.int64)  # numbers taken before it
        firsts = np.flatnonzero(np.r_[True, tree[1:] != tree[:-1]])
        first_of_tree[tree[firsts]] = (within - taken)[firsts]
        number = numbered[tree] + within - first_of_tree[tree] - split  # the right leaf's
        right[ends] = -number[ends]
        at = np.flatnonzero(ends)
        twins = split[at]
        reached_nodes += [np.where(twins, right_child[frontier[at]], frontier[at]),
                          left[frontier[at[twins]]]]
        reached_numbers += [np.stack([tree[at], number[at]], 1),
                            np.stack([tree[at[twins]], number[at[twins]] + 1], 1)]
        numbered += np.bincount(tree, weights=taken, minlength=len(trees)).astype(np.int64)
        levels.append({"slot": slot_of[frontier], "bound": bound_of[frontier], "right": right})
        carried = np.repeat(frontier, below)
        place = right[split & ~ends] - 2  # 0-based place of each split's left child
        carried[place] = left[frontier[split & ~ends]]
        carried[place + 1] = right_child[frontier[split & ~ends]]
        frontier = carried
    if depth == 0:
        return [], [np.zeros(1, dtype=np.int64) for _ in trees]
    nodes = np.concatenate(reached_nodes)
    keys = np.concatenate(reached_numbers)
    order = np.lexsort((keys[:, 1], keys[:, 0]))
    nodes, owners = nodes[order], keys[order, 0]
    ends = np.cumsum(np.bincount(owners, minlength=len(trees)))[:-1]
    return levels, np.split(nodes - start[owners], ends)


class Walk(NamedTuple):
    """A forest's walk: its levels' forest-wide slot, bound and right arrays, each tree's
    leaf node ids by leaf number, and the first level a row can arrive at already at a
    leaf (its step then keeps such rows; the forest's depth when leaves are carried)."""

    levels: list[dict[str, np.ndarray]]
    leaves: list[np.ndarray]
    tested_from: int


class ForestLevels(TextArrays):
    name = "forest_levels"
    summary = ("one array of every tree's node per row, stepped by one array map per level "
               "over forest-wide level arrays (ClickHouse)")

    def __init__(self) -> None:
        super().__init__(0)
        self._walk: Walk | None = None

    def _check(self, profile: Profile) -> None:
        require_keys(profile, (*REQUIRED_KEYS, "array_map"), self.name)

    def constants(self, ctx: Context) -> list[tuple[str, str]]:
        return []  # each stage names its own level's arrays

    @staticmethod
    def _entries(forest: Forest, depth: int) -> tuple[bool, int]:
        """Whether leaves are carried down to the last level (see ENTRIES_PER_NODE), and
        about how many nodes the walk then passes (without carrying, at most every node)."""
        carried = sum(walk_entries(tree, depth) for tree in forest.trees)
        if carried <= ENTRIES_PER_NODE * forest.n_nodes:
            return True, carried
        return False, forest.n_nodes

    def _forest_walk(self, ctx: Context) -> Walk:
        """The forest's walk, made once (every stage and every term reads it)."""
        if self._walk is None:
            forest, depth = ctx.forest, self.depth(ctx.forest)
            carry, _ = self._entries(forest, depth)
            levels, leaves = forest_layout(forest, depth, len(ctx.features), ctx.bounds, carry)
            tested_from = depth if carry else 1 + min(
                int(tree.node_depths()[tree.left == LEAF].min()) for tree in forest.trees)
            self._walk = Walk(levels, leaves, tested_from)
        return self._walk

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        self._check(ctx.profile)
        p, trees = ctx.profile, len(ctx.forest.trees)
        xs, ns, g = ctx.prefix("xs"), ctx.prefix("ns"), ctx.prefix("g")
        walk = self._forest_walk(ctx)
        # Each tree's one node on level 0, forest-wide; a forest of lone leaves is done.
        first = np.arange(1, trees + 1) if walk.levels else -np.ones(trees, dtype=np.int64)
        roots = array_from_numbers(p, first, p.raw["integer_type"])
        stages = [(ctx.prefix("walk0"), "SELECT " + ",\n  ".join(
            [*ctx.keys, ctx.ok, f"{self._row_array(ctx)} AS {xs}", f"{roots} AS {ns}"])
            + f"\nFROM {ctx.source}")]
        element = self._elements(p)
        for k, arrays in enumerate(walk.levels):
            written = {what: array_from_numbers(p, values, element[what])
                       for what, values in arrays.items()}
            if "constant_alias" in p.raw:  # named in the stage's WITH
                names = {what: self._name(ctx, what, k) for what in arrays}
                named = stage_constants(p, [(names[what], written[what]) for what in arrays])
            else:  # each array is read once: written where it is read
                names, named = written, ""
            value = self._index(ctx, xs, self._index(ctx, names["slot"], g))
            bound, right = (self._index(ctx, names[what], g) for what in ("bound", "right"))
            body = f"{right} - {p.indicator(f'{value} <= {bound}')}"
            if k >= walk.tested_from:  # rows at a leaf already keep its number
                body = f"CASE WHEN {g} < 0 THEN {g} ELSE {body} END"
            step = p.raw["array_map"].format(name=g, body=body, array=ns)
            keep = [*ctx.keys, ctx.ok, *([xs] if k + 1 < len(walk.levels) else [])]
            stages.append((ctx.prefix(f"walk{k + 1}"), f"{named}SELECT "
                           + ",\n  ".join([*keep, f"{step} AS {ns}"])
                           + f"\nFROM {stages[-1][0]}"))
        return stages

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        leaves = self._forest_walk(ctx).leaves[tree_index]
        values = self._leaf_array(ctx, leaves, np.ones(len(leaves), bool), leaf_value)
        number = "-" + self._index(ctx, ctx.prefix("ns"), str(tree_index + 1))
        return self._index(ctx, values, number)

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        self._check(profile)
        depth = self.depth(forest)
        _, entries = self._entries(forest, depth)
        leaves = sum(int((tree.left == LEAF).sum()) for tree in forest.trees)
        outputs = max(1, forest.n_outputs)
        # Bytes per array element: a slot, a right child and a bound (up to 24 characters)
        # per node walked, a double per leaf and output; then each level's map and each
        # tree's term.
        size = 36 * entries + 26 * outputs * leaves + 600 * depth \
            + 150 * len(forest.trees) * outputs + 300 * forest.n_features + 2000
        elements = 40 * forest.n_features + 40 * depth + 12 * len(forest.trees) * outputs
        return Needs(size, case_depth=1, expression_depth=12,
                     select_columns=forest.n_features + 4, ast_elements=elements,
                     constant_elements=3 * entries + outputs * leaves)
