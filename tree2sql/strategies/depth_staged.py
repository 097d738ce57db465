"""Trees walked a few levels per CTE stage, each row carrying one node id per tree.

For engines that cap CASE nesting (SQL Server: 10 levels, error 125; SQLite's parser
stack: under 20) or choke on one huge expression (Spark's generated code). Stage s moves
every tree from the node it reached at depth s*k down at most k more levels:

    n = CASE n WHEN 5 THEN <k levels of nested CASE from node 5, ending in node ids>
               WHEN 6 THEN ... ELSE n END

so no expression nests deeper than k + 1. A tree that reached a leaf keeps its node id
(the ELSE branch). The last term maps a tree's leaf id to its value. Where the profile can
fence stages, both lookups are binary searches over the ids (`node_lookup`), and a stage
walks as many fewer levels as its search is deep; elsewhere they list the ids flat. Node
ids are the model's own, so the same SQL can report the leaf each row reached.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.forest import LEAF, Forest
from tree2sql.strategies.base import (
    Context,
    LeafValue,
    Needs,
    Strategy,
    feature_bytes,
    leaf_literals,
    literal_bytes,
)
from tree2sql.strategies.nested_case import CaseText, side_by_side, split_conditions

DEFAULT_LEVELS = 8  # per stage, when a profile states neither a CASE limit nor stage_levels
EXPRESSION_DEPTH_PER_LEVEL = 2  # a CASE level costs up to two levels of expression depth
FLAT_IDS = 4  # ids a lookup lists flat rather than halving again
# CASE levels of a stage's frontier search: each level taken from the walk can add a stage,
# and a stage copies every row. SQLite, 20 fully grown trees (frontier ~160 ids), 50k rows:
# flat 3.5-3.7 s, 2 levels 3.0 s, 3 levels 2.8-2.9 s, 4 levels 3.0 s, 7 levels 4.0 s.
DISPATCH_LEVELS = 3


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


def node_lookup(node: str, ids: Sequence[int], values: Sequence[str], levels: int,
                otherwise: str | None = None) -> str:
    """`values[i]` for the id `ids[i]` held in column `node` (ids ascending): a binary
    search at most `levels` CASE levels deep whose last level lists its few ids flat;
    `otherwise` for an id not listed (None: every row holds one of `ids`).

    A flat `CASE n WHEN ...` over a fully grown tree's thousand leaves costs a row
    engine one comparison per leaf passed (SQLite: 58 us per tree and row, measured on
    trees of 3,000 nodes); the search costs about log2(leaves) comparisons.
    """
    parts: list[str] = []
    ending = " END" if otherwise is None else f" ELSE {otherwise} END"

    def search(low: int, high: int, levels: int) -> None:
        if high - low == 1 and otherwise is None:
            parts.append(values[low])
        elif levels <= 1 or high - low <= FLAT_IDS:
            parts.append(f"CASE {node}")
            for i in range(low, high):
                parts.extend((" WHEN ", str(ids[i]), " THEN ", values[i]))
            parts.append(ending)
        else:
            half = low + (high - low) // 2
            parts.append(f"CASE WHEN {node} < {ids[half]} THEN ")
            search(low, half, levels - 1)
            parts.append(" ELSE ")
            search(half, high, levels - 1)
            parts.append(" END")

    search(0, len(ids), levels)
    return "".join(parts)


def lookup_levels(count: int) -> int:
    """CASE levels `node_lookup` needs to bring `count` ids down to flat lists."""
    levels = 1
    while count > FLAT_IDS:
        count, levels = count - count // 2, levels + 1
    return levels


def searches(profile: Profile) -> bool:
    """Lookups may search: a search reads the node id once per level, and only fenced
    stages (`cte_materialized`) keep an engine that inlines CTEs from copying the id's
    whole expression into each read."""
    return bool(profile.raw.get("cte_materialized"))


class DepthStaged(Strategy):
    name = "depth_staged"
    summary = "node id per tree, a few levels per CTE stage (bounded CASE nesting)"

    def __init__(self) -> None:
        self._depths: list[np.ndarray] = []  # per tree, each node's depth
        self._stages: list[tuple[int, int, int]] | None = None

    def _node(self, ctx: Context, t: int) -> str:
        return ctx.prefix(f"n{t}")

    def _plan(self, ctx: Context) -> list[tuple[int, int, int]]:
        """Per stage: (start depth, tree levels it walks, CASE levels of its dispatch).

        A stage nests k + 1 CASE levels: the first walks k from the roots; each later one
        finds a row's node among the frontier (one flat `CASE n WHEN` level, or a search of
        up to DISPATCH_LEVELS levels where lookups may search) and walks the levels left.
        """
        if self._stages is None:
            k = levels_per_stage(ctx.profile)
            self._depths = [tree.node_depths() for tree in ctx.forest.trees]
            deepest = max(int(d.max()) for d in self._depths)
            plan, start = [(0, k, 0)], k
            while start < deepest:
                dispatch = 1
                if searches(ctx.profile):
                    widest = max(len(self._frontier(ctx, t, start))
                                 for t in range(len(ctx.forest.trees)))
                    dispatch = min(lookup_levels(widest), DISPATCH_LEVELS, k)
                plan.append((start, k + 1 - dispatch, dispatch))
                start += k + 1 - dispatch
            self._stages = plan if deepest else []
        return self._stages

    def _frontier(self, ctx: Context, t: int, start: int) -> list[int]:
        """Tree t's split nodes at depth `start`: where its rows stand when a stage begins."""
        inner = ctx.forest.trees[t].left != LEAF
        return np.flatnonzero((self._depths[t] == start) & inner).tolist()

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        plan = self._plan(ctx)
        trees = ctx.forest.trees
        deepest = [int(d.max()) for d in self._depths]
        carried = [*ctx.keys, ctx.ok, *ctx.features]
        stacked, bound, offsets = side_by_side(trees, ctx.bounds)
        splits = split_conditions(ctx, stacked, bound)
        stages: list[tuple[str, str]] = []
        source = ctx.source
        for start, levels, dispatch in plan:
            # Where each tree's rows stand as the stage begins; every walk laid out at once.
            frontiers = [[0] if start == 0 else
                         self._frontier(ctx, t, start) if deepest[t] > start else []
                         for t in range(len(trees))]
            walks = CaseText(stacked, splits, np.concatenate(
                [np.array(f, dtype=np.int64) + offsets[t] for t, f in enumerate(frontiers)]),
                levels)
            root = 0
            columns = []
            for t, frontier in enumerate(frontiers):
                node = self._node(ctx, t)
                texts = [walks.render_root(root + i, str, int(offsets[t]))
                         for i in range(len(frontier))]
                root += len(frontier)
                if start == 0:
                    step = texts[0]
                elif frontier:
                    step = node_lookup(node, frontier, texts, dispatch, otherwise=node)
                else:
                    step = node
                columns.append(f"{step} AS {node}")
            name = ctx.prefix(f"level{start}")
            stages.append((name, "SELECT " + ",\n  ".join(carried + columns)
                           + f"\nFROM {source}"))
            source = name
        return stages

    def fenced_stages(self, ctx: Context) -> set[str]:
        """Every stage: the next one, and the leaf lookups, read each node id many times."""
        return {ctx.prefix(f"level{start}") for start, _, _ in self._plan(ctx)}

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        leaves = np.flatnonzero(ctx.forest.trees[tree_index].left == LEAF)
        levels = levels_per_stage(ctx.profile) if searches(ctx.profile) else 1
        return node_lookup(self._node(ctx, tree_index), leaves.tolist(),
                           leaf_literals(leaf_value, leaves), levels)

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        k = levels_per_stage(profile)
        deepest = max(tree.depth() for tree in forest.trees)
        step = k + 1 - min(DISPATCH_LEVELS, k) if searches(profile) else k  # later stages
        stages = 1 + -(-max(0, deepest - k) // step)
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
