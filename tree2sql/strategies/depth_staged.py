"""Trees walked a few levels per CTE stage, each row carrying one node id per tree.

For engines that cap CASE nesting (SQL Server: 10 levels, error 125; SQLite's parser
stack: under 20) or choke on one huge expression (Spark's generated code). Stage s moves
every tree from the node it reached at depth s*k down at most k more levels:

    n = CASE n WHEN 5 THEN <k levels of nested CASE from node 5, ending in node ids>
               WHEN 6 THEN ... ELSE n END

so no expression nests deeper than k + 1. A tree that reached a leaf keeps its node id
(the ELSE branch). The last term maps a tree's leaf id to its value. Where the profile can
fence stages, both lookups are binary searches over the ids (`Lookups`), and a stage
walks as many fewer levels as its search is deep; elsewhere they list the ids flat. Node
ids are the model's own, so the same SQL can report the leaf each row reached.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.exact import integer_texts
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
WHEN = " WHEN {} THEN "  # an id listed flat (Lookups)
BELOW = " < {} THEN "  # the id a search splits at (Lookups)
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


class _Level(NamedTuple):
    """One level of several binary searches: each interval's lookup, its ids [low,
    low + size), and how it is written."""

    look: np.ndarray
    low: np.ndarray
    size: np.ndarray
    bare: np.ndarray  # one id and nothing else possible: its value alone
    flat: np.ndarray  # `CASE n WHEN id THEN value ...` over its ids
    split: np.ndarray  # halved at low + size // 2; its halves are the next level's


def _search_levels(counts: np.ndarray, levels: int, bare_ok: np.ndarray) -> list[_Level]:
    """The intervals of every search, level by level; a level's left halves come first,
    then its right halves, each in the order of the splits they come from."""
    found: list[_Level] = []
    look, low, size = np.arange(len(counts)), np.zeros(len(counts), np.int64), counts
    levels_left = np.full(len(counts), levels)
    while look.size:
        bare = (size == 1) & bare_ok[look]
        flat = ~bare & ((levels_left <= 1) | (size <= FLAT_IDS))
        split = ~bare & ~flat
        found.append(_Level(look, low, size, bare, flat, split))
        left = size[split] // 2
        look = np.concatenate([look[split]] * 2)
        levels_left = np.concatenate([levels_left[split] - 1] * 2)
        low = np.concatenate([low[split], low[split] + left])
        size = np.concatenate([left, size[split] - left])
    return found


class Lookups:
    """Lookups of `values[i]` for the id `ids[j][i]` held in column `nodes[j]` (ids
    ascending), each a binary search at most `levels` CASE levels deep whose last level
    lists its few ids flat, `otherwise[j]` for an id not listed (None: every row holds
    one of its ids).

    A flat `CASE n WHEN ...` over a fully grown tree's thousand leaves costs a row
    engine one comparison per leaf passed (SQLite: 58 us per tree and row, measured on
    trees of 3,000 nodes); the search costs about log2(leaves) comparisons.

    Every lookup's text is laid out at once, level by level in numpy, with a hole for
    each value; each output (a class's values, the node ids a stage walks to) only fills
    one lookup's holes. Written one CASE per Python call, the searches took a third of a
    fully grown forest's compile. A split writes four pieces around its halves (`CASE
    WHEN n`, ` < ` the middle id ` THEN `, left half, ` ELSE `, right half, ` END`); a flat
    list `CASE n`, two per id (` WHEN id THEN `, value) and its ending.
    """

    def __init__(self, nodes: Sequence[str], ids: Sequence[Sequence[int]], levels: int,
                 otherwise: Sequence[str | None]) -> None:
        counts = np.array([len(i) for i in ids], dtype=np.int64)
        base = np.concatenate([[0], np.cumsum(counts)[:-1]])  # each lookup's first id
        every_id = np.concatenate([np.asarray(i, dtype=np.int64) for i in ids])
        below, when_texts = integer_texts(every_id, BELOW), integer_texts(every_id, WHEN)
        opening = np.array([f"CASE {n}" for n in nodes], dtype=object)
        test = np.array([f"CASE WHEN {n}" for n in nodes], dtype=object)
        ending = np.array([" END" if o is None else f" ELSE {o} END" for o in otherwise],
                          dtype=object)
        found = _search_levels(counts, levels, np.array([o is None for o in otherwise]))
        pieces = [np.empty(0, np.int64)] * (len(found) + 1)  # per level, each interval's
        for d in range(len(found) - 1, -1, -1):
            level, halves = found[d], pieces[d + 1]
            pieces[d] = np.where(level.bare, 1, 2 + 2 * level.size)
            splits = int(level.split.sum())
            pieces[d][level.split] = 4 + halves[:splits] + halves[splits:]
        self._ends = np.cumsum(pieces[0])
        self._begins = self._ends - pieces[0]
        text = np.empty(int(self._ends[-1]), dtype=object)
        holes = np.empty(int(counts.sum()), dtype=np.int64)  # place of each value
        start = self._begins
        for d, level in enumerate(found):
            at, look = start[level.split], level.look[level.split]
            left = pieces[d + 1][:len(at)]
            middle = base[look] + level.low[level.split] + level.size[level.split] // 2
            text[at], text[at + 1] = test[look], below[middle]
            text[at + 2 + left], text[at + pieces[d][level.split] - 1] = " ELSE ", " END"
            holes[base[level.look[level.bare]] + level.low[level.bare]] = start[level.bare]
            at, look, size = start[level.flat], level.look[level.flat], level.size[level.flat]
            text[at], text[at + 1 + 2 * size] = opening[look], ending[look]
            k = np.arange(int(size.sum())) - np.repeat(np.cumsum(size) - size, size)
            listed = np.repeat(at, size) + 1 + 2 * k
            first = np.repeat(base[look] + level.low[level.flat], size) + k
            text[listed] = when_texts[first]
            holes[first] = listed + 1
            start = np.concatenate([start[level.split] + 2, start[level.split] + 3 + left])
        self._text, self._holes, self._base, self._counts = text, holes, base, counts

    def render(self, j: int, values: Sequence[str]) -> str:
        """Lookup j's text, its holes filled with `values` (in the order of its ids): in
        place, since every hole of the lookup is filled each time."""
        begin, end, first = int(self._begins[j]), int(self._ends[j]), int(self._base[j])
        self._text[self._holes[first:first + int(self._counts[j])]] = np.asarray(
            values, dtype=object)
        return "".join(self._text[begin:end].tolist())


def lookup_levels(count: int) -> int:
    """CASE levels a search (`Lookups`) needs to bring `count` ids down to flat lists."""
    levels = 1
    while count > FLAT_IDS:
        count, levels = count - count // 2, levels + 1
    return levels


def searches(profile: Profile) -> bool:
    """Lookups may search: a search reads the node id once per level, and only fenced
    stages (`Profile.fences_stages`) keep an engine that inlines CTEs from copying the
    id's whole expression into each read."""
    return profile.fences_stages


class DepthStaged(Strategy):
    name = "depth_staged"
    summary = "node id per tree, a few levels per CTE stage (bounded CASE nesting)"

    def __init__(self) -> None:
        self._depths: list[np.ndarray] = []  # per tree, each node's depth
        self._stages: list[tuple[int, int, int]] | None = None
        self._leaf_lookups: Lookups | None = None  # every tree's leaf lookup

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
            self._depths = ctx.forest.node_depths()
            deepest = ctx.forest.depth()
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
        deepest = ctx.forest.tree_depths()
        carried = [*ctx.keys, ctx.ok, *ctx.features]
        stacked, bound, offsets = side_by_side(ctx.forest, ctx.bounds)
        splits = split_conditions(ctx, stacked, bound)
        # Each stacked node's text as its own tree's node id: what a cut walk ends in.
        local_ids = integer_texts(np.arange(stacked.n_nodes) - np.repeat(
            offsets, [tree.n_nodes for tree in trees]))
        nodes = [self._node(ctx, t) for t in range(len(trees))]
        stages: list[tuple[str, str]] = []
        source = ctx.source
        for start, levels, dispatch in plan:
            # Where each tree's rows stand as the stage begins; every walk laid out at once.
            frontiers = [[0] if start == 0 else
                         self._frontier(ctx, t, start) if deepest[t] > start else []
                         for t in range(len(trees))]
            roots = np.concatenate(
                [np.array(f, dtype=np.int64) + offsets[t] for t, f in enumerate(frontiers)])
            walked = CaseText(stacked, splits, roots, levels).render_roots(
                range(len(roots)), local_ids)
            if start == 0:
                steps = walked
            else:  # each tree's rows found among its frontier; every search laid out at once
                going = [t for t, frontier in enumerate(frontiers) if frontier]
                lookups = Lookups([nodes[t] for t in going], [frontiers[t] for t in going],
                                  dispatch, [nodes[t] for t in going])
                steps, root = list(nodes), 0  # a tree already at its leaves keeps its node
                for j, t in enumerate(going):
                    count = len(frontiers[t])
                    steps[t] = lookups.render(j, walked[root:root + count])
                    root += count
            # One join writes the stage: a stage is megabytes, and each copy costs.
            parts = ["SELECT ", ",\n  ".join(carried)]
            for step, node in zip(steps, nodes, strict=True):
                parts += [",\n  ", step, " AS ", node]
            name = ctx.prefix(f"level{start}")
            stages.append((name, "".join([*parts, f"\nFROM {source}"])))
            source = name
        return stages

    def fenced_stages(self, ctx: Context) -> set[str]:
        """Every stage: the next one, and the leaf lookups, read each node id many times."""
        return {ctx.prefix(f"level{start}") for start, _, _ in self._plan(ctx)}

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        leaves = np.flatnonzero(ctx.forest.trees[tree_index].left == LEAF)
        if self._leaf_lookups is None:  # every tree's at once, the same for every output
            trees = range(len(ctx.forest.trees))
            levels = levels_per_stage(ctx.profile) if searches(ctx.profile) else 1
            self._leaf_lookups = Lookups(
                [self._node(ctx, t) for t in trees],
                [np.flatnonzero(ctx.forest.trees[t].left == LEAF) for t in trees],
                levels, [None] * len(trees))
        return self._leaf_lookups.render(tree_index, leaf_literals(leaf_value, leaves))

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        k = levels_per_stage(profile)
        deepest = forest.depth()
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
