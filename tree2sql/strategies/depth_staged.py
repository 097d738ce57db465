"""Trees walked a few levels per CTE stage, each row carrying one node id per tree.

For engines that cap CASE nesting (SQL Server: 10 levels, error 125; SQLite's parser
stack: under 20) or choke on one huge expression (Spark's generated code). Stage s moves
every tree from the node it reached at depth s*k down at most k more levels:

    n = CASE n WHEN 5 THEN <k levels of nested CASE from node 5, ending in node ids>
               WHEN 6 THEN ... ELSE n END

so no expression nests deeper than k + 1. A tree that reached a leaf keeps its node id
(the ELSE branch). The last term maps a tree's leaf id to its value by a binary search
over the leaf ids, at most k levels deep (`node_lookup`).
Node ids are the model's own, so the same SQL can report the leaf each row reached.
"""

from __future__ import annotations

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
from tree2sql.strategies.nested_case import nested_case, split_conditions

DEFAULT_LEVELS = 8  # per stage, when a profile states neither a CASE limit nor stage_levels
EXPRESSION_DEPTH_PER_LEVEL = 2  # a CASE level costs up to two levels of expression depth
FLAT_IDS = 4  # ids a lookup lists flat rather than halving again


def levels_per_stage(profile: Profile) -> int:
    """Tree levels per stage: the profile's shape setting, else what its CASE limit allows.

    One level of the limit goes to the outer `CASE n WHEN ...`, one to the compiler's own
    CASE around the final sum (which holds only the flat leaf lookup).
    """
    levels = profile.raw.get("stage_levels")
    case_limit = profile.limit("case_depth")
    if levels is None:
        levels = case_limit - 1 if case_limit else DEFAULT_LEVELS
    depth_limit = profile.limit("expression_depth")
    if depth_limit:
        levels = min(levels, (depth_limit - 120) // EXPRESSION_DEPTH_PER_LEVEL)
    return max(1, int(levels))


def node_depths(tree: Tree) -> list[int]:
    """Depth of every node (root 0), without recursion."""
    depth = [0] * tree.n_nodes
    for node in tree.preorder():
        if tree.left[node] != LEAF:
            depth[int(tree.left[node])] = depth[int(tree.right[node])] = depth[node] + 1
    return depth


def render_levels(tree: Tree, conditions: list[str | None], root: int, levels: int) -> str:
    """Nested CASE from `root` down `levels` tree levels, giving the node id reached."""
    return nested_case(tree, conditions, str, root, levels)


def node_lookup(node: str, ids: list[int], value: LeafValue, levels: int) -> str:
    """`value(id)` for the id held in column `node` (ids ascending): a binary search at most
    `levels` CASE levels deep whose last level lists its few ids flat.

    A flat `CASE n WHEN ...` over a fully grown tree's thousand leaves costs a row
    engine one comparison per leaf passed (SQLite: 58 us per tree and row, measured on
    trees of 3,000 nodes); the search costs about log2(leaves) comparisons.
    """
    if len(ids) == 1:
        return value(ids[0])
    if levels <= 1 or len(ids) <= FLAT_IDS:
        return f"CASE {node} " + " ".join(f"WHEN {n} THEN {value(n)}" for n in ids) + " END"
    half = len(ids) // 2
    return (f"CASE WHEN {node} < {ids[half]} THEN "
            f"{node_lookup(node, ids[:half], value, levels - 1)} "
            f"ELSE {node_lookup(node, ids[half:], value, levels - 1)} END")


class DepthStaged(Strategy):
    name = "depth_staged"
    summary = "node id per tree, a few levels per CTE stage (bounded CASE nesting)"

    def __init__(self) -> None:
        self._conditions: dict[int, list[str | None]] = {}

    def _split(self, ctx: Context, t: int) -> list[str | None]:
        if t not in self._conditions:
            self._conditions[t] = split_conditions(ctx, t)
        return self._conditions[t]

    def _node(self, ctx: Context, t: int) -> str:
        return ctx.prefix(f"n{t}")

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        forest = ctx.forest
        k = levels_per_stage(ctx.profile)
        depths = [node_depths(tree) for tree in forest.trees]
        deepest = [max(d) for d in depths]
        carried = [*ctx.keys, ctx.ok, *ctx.features]
        stages: list[tuple[str, str]] = []
        source = ctx.source
        for stage, start in enumerate(range(0, max(deepest), k)):
            columns = []
            for t, tree in enumerate(forest.trees):
                node = self._node(ctx, t)
                if stage == 0:
                    step = render_levels(tree, self._split(ctx, t), 0, k)
                elif deepest[t] > start:
                    step = self._stage_step(ctx, t, depths[t], start, k, node)
                else:
                    step = node
                columns.append(f"{step} AS {node}")
            name = ctx.prefix(f"level{start}")
            stages.append((name, "SELECT " + ",\n  ".join(carried + columns)
                           + f"\nFROM {source}"))
            source = name
        return stages

    def _stage_step(self, ctx: Context, t: int, depth: list[int], start: int, k: int,
                    node: str) -> str:
        tree = ctx.forest.trees[t]
        conditions = self._split(ctx, t)
        frontier = [n for n in range(tree.n_nodes)
                    if depth[n] == start and tree.left[n] != LEAF]
        branches = " ".join(f"WHEN {n} THEN {render_levels(tree, conditions, n, k)}"
                            for n in frontier)
        return f"CASE {node} {branches} ELSE {node} END"

    def fenced_stages(self, ctx: Context) -> set[str]:
        """Every stage: the next one, and the leaf lookups, read each node id many times."""
        deepest = max(tree.depth() for tree in ctx.forest.trees)
        k = levels_per_stage(ctx.profile)
        return {ctx.prefix(f"level{start}") for start in range(0, deepest, k)}

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        tree = ctx.forest.trees[tree_index]
        leaves = [int(n) for n in (tree.left == LEAF).nonzero()[0]]
        # A search reads the node id once per level; without a fence, an engine that
        # inlines CTEs would copy the id's whole expression into each read.
        levels = levels_per_stage(ctx.profile) if ctx.profile.raw.get("cte_materialized") \
            else 1
        return node_lookup(self._node(ctx, tree_index), leaves, leaf_value, levels)

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        k = levels_per_stage(profile)
        deepest = max(tree.depth() for tree in forest.trees)
        stages = -(-deepest // k) if deepest else 1
        internal = sum(int((tree.left != LEAF).sum()) for tree in forest.trees)
        leaves = forest.n_nodes - internal
        walk = internal * (70 + 2 * feature_bytes(profile, forest) + literal_bytes(profile))
        lookup = leaves * (20 + literal_bytes(profile)) * forest.n_outputs
        carried = (forest.n_features + len(forest.trees)) * 24 * stages
        return Needs(walk + lookup + carried + 4000,
                     # stages nest k + 1 deep; the planner adds the one level that the
                     # compiler's CASE around the sum costs, which stages do not pay
                     case_depth=max(1, min(k, deepest)),
                     expression_depth=EXPRESSION_DEPTH_PER_LEVEL * min(k, deepest) + 6,
                     select_columns=forest.n_features + len(forest.trees) + 4)
