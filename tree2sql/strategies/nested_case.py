"""Each tree as one nested CASE expression over the feature columns.

The plainest shape: readable, portable to every dialect, and exact. It costs one branch per
node visited per row; engines that evaluate CASE per vector pay per node instead (see
benchmarks/README.md), which is why other strategies exist.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.exact import repeated
from tree2sql.forest import LEAF, Forest, Tree
from tree2sql.strategies.base import (
    Context,
    LeafValue,
    Needs,
    Strategy,
    feature_bytes,
    leaf_literals,
    literal_bytes,
)

# How a node routes a row (Splits.route).
UNUSED = 0  # a leaf, or a split the caller did not ask for
THEN = " THEN "  # ends every operand (Splits)
TEST_LEFT = 1  # CASE WHEN condition THEN left ELSE right END
# CASE WHEN condition THEN right ELSE left END: where missing values go left, the condition
# is written `x > b`, and a NULL condition is not true (SQL standard, three-valued logic),
# so NULL takes the ELSE branch with no `OR x IS NULL` test of its own.
TEST_RIGHT = 2
GO_LEFT = 3  # every row goes left (no CASE written)
GO_RIGHT = 4  # every row goes right


@dataclass(frozen=True)
class Splits:
    """Per node of one tree: how it routes a row (`route`) and, for a test, its CASE
    opening in two pieces: `opening` (`CASE WHEN x <= `, one shared string per feature
    and operator) and `operand` (the bound's literal, if any, then ` THEN `), object
    arrays of str. Kept apart, they are never concatenated per node; the final join
    writes them. `first` and `second`: the child each node's text holds first (after
    THEN, or the only one where no test is written) and second (after ELSE)."""

    route: np.ndarray
    opening: np.ndarray
    operand: np.ndarray
    first: np.ndarray
    second: np.ndarray


# Per feature, the openings split_conditions writes, by these columns.
OPENINGS = 4
AT_MOST, ABOVE, MISSING, PRESENT = range(OPENINGS)


def _openings(features: Sequence[str]) -> np.ndarray:
    return np.array([[f"CASE WHEN {x} <= ", f"CASE WHEN {x} > ", f"CASE WHEN {x} IS NULL",
                      f"CASE WHEN {x} IS NOT NULL"] for x in features], dtype=object)


def side_by_side(forest: Forest, bounds: Sequence[np.ndarray],
                 ) -> tuple[Tree, np.ndarray, np.ndarray]:
    """The forest's trees as one node space (each tree's ids shifted past the previous
    trees'), its bounds, and each tree's offset (where its root is): one numpy pass lays
    out every tree at once, instead of one pass per tree."""
    trees, offsets = forest.trees, forest.starts[:-1]

    def shifted(children: str) -> np.ndarray:
        return np.concatenate([np.where(getattr(tree, children) == LEAF, LEAF,
                                        getattr(tree, children) + offset)
                               for tree, offset in zip(trees, offsets, strict=True)])

    stacked = Tree(np.concatenate([tree.feature for tree in trees]),
                   np.concatenate([tree.threshold for tree in trees]),
                   shifted("left"), shifted("right"),
                   np.concatenate([tree.missing_left for tree in trees]),
                   np.concatenate([tree.value for tree in trees]))
    return stacked, np.concatenate(bounds), offsets


def split_conditions(ctx: Context, tree: Tree, bound: np.ndarray,
                     nodes: np.ndarray | None = None) -> Splits:
    """Every split's routing and condition (`bound`: the tree's bounds), written in bulk.

    Rows with a missing value follow the model's missing direction; where the model
    cannot take missing values the compiler has already given such rows NULL scores.
    `nodes` limits the work to those split nodes (the others stay UNUSED).
    """
    route = np.zeros(tree.n_nodes, dtype=np.int8)
    opening = repeated("", tree.n_nodes)
    operand = repeated(THEN, tree.n_nodes)
    if nodes is None:
        nodes = np.flatnonzero(tree.left != LEAF)
    nodes = np.asarray(nodes, dtype=np.int64)
    bound = bound[nodes]
    missing_left = tree.missing_left[nodes].astype(bool) & ctx.forest.accepts_missing
    finite = np.isfinite(bound)
    at = nodes[finite]
    sends_right = missing_left[finite]
    operand[at] = ctx.profile.doubles(bound[finite], THEN)
    kind = np.full(len(nodes), -1, dtype=np.int64)  # each split's opening column, if any
    kind[finite] = np.where(sends_right, ABOVE, AT_MOST)
    route[at] = np.where(sends_right, TEST_RIGHT, TEST_LEFT)
    # +inf: every value goes left (missing too, where the model sends it left);
    # -inf: only missing values may go left.
    up, down = bound == np.inf, bound == -np.inf
    everything = up & (missing_left | (not ctx.forest.accepts_missing))
    route[nodes[everything]] = GO_LEFT
    present = up & ~everything
    route[nodes[present]], kind[present] = TEST_LEFT, PRESENT
    absent = down & missing_left
    route[nodes[absent]], kind[absent] = TEST_LEFT, MISSING
    route[nodes[down & ~missing_left]] = GO_RIGHT
    tested = np.flatnonzero(kind >= 0)
    opening[nodes[tested]] = _openings(ctx.features).ravel()[
        tree.feature[nodes[tested]] * OPENINGS + kind[tested]]
    first = np.where((route == TEST_RIGHT) | (route == GO_RIGHT), tree.right, tree.left)
    return Splits(route, opening, operand, first,
                  np.where(route == TEST_RIGHT, tree.left, tree.right))


def _separators(most: int) -> np.ndarray:
    """By code c: what follows a hole in nested CASE text, c // 2 ` END`s, then ` ELSE `
    where c is odd."""
    return np.array([" END" * (c // 2) + (" ELSE " if c % 2 else "") for c in range(most + 1)],
                    dtype=object)


class CaseText:
    """Nested CASE text of one tree from each of `roots`, with holes for the values of the
    nodes where it stops (leaves, or nodes `levels` below the root): the layout is worked
    out once, level by level in numpy, and each output (a class, a leaf id) only fills
    the holes.

    Each split written as a test takes two pieces (its opening and operand), each hole two:
    its value and what follows it, which is always some ` END`s, then an ` ELSE ` unless
    the root's text ends there (`_separators`). Where ELSE and END were pieces of their
    own, a grown forest's text had a quarter more pieces to place and join. A subtree's
    pieces are contiguous, so a node's place follows from its first branch's piece count,
    computed leaves first.
    """

    def __init__(self, tree: Tree, splits: Splits, roots: Sequence[int] = (0,),
                 levels: int | None = None) -> None:
        route, first, second = splits.route, splits.first, splits.second
        tests = (route == TEST_LEFT) | (route == TEST_RIGHT)
        hole = np.zeros(tree.n_nodes, dtype=bool)
        by_level: list[np.ndarray] = []
        frontier = np.asarray(roots, dtype=np.int64)
        while frontier.size:
            hole[frontier] = (tree.left[frontier] == LEAF) | (len(by_level) == levels)
            by_level.append(frontier)
            walked = frontier[~hole[frontier]]
            frontier = np.concatenate([first[walked], second[walked[tests[walked]]]])
        reached = np.concatenate(by_level)
        test = ~hole & tests
        pieces = np.zeros(tree.n_nodes, dtype=np.int64)  # a subtree's piece count
        steps = []  # per level, bottom up: its tests, their branches, and its passing nodes
        for nodes in reversed(by_level):
            at_hole, at_test = hole[nodes], test[nodes]
            own, passing = nodes[at_test], nodes[~at_hole & ~at_test]
            then, otherwise = first[own], second[own]
            pieces[nodes[at_hole]] = 2
            pieces[passing] = pieces[first[passing]]
            then_pieces = pieces[then]
            pieces[own] = 2 + then_pieces + pieces[otherwise]
            steps.append((own, then, otherwise, then_pieces, passing))
        start = np.zeros(tree.n_nodes, dtype=np.int64)
        start[by_level[0]] = np.concatenate([[0], np.cumsum(pieces[by_level[0]])[:-1]])
        # What follows a subtree's text: 2 per END, plus 1 where an ELSE comes next.
        after = np.zeros(tree.n_nodes, dtype=np.int64)
        for own, then, otherwise, then_pieces, passing in reversed(steps):
            start[first[passing]], after[first[passing]] = start[passing], after[passing]
            at = start[own] + 2
            start[then], after[then] = at, 1
            start[otherwise], after[otherwise] = at + then_pieces, after[own] + 2
        # Nodes in the order they are written (starts of tests and holes are distinct):
        # pieces written in place order touch memory in sequence, several times faster
        # than in level order for a fully grown forest's million pieces.
        node_at = np.full(int(pieces[by_level[0]].sum()), -1, dtype=np.int64)
        shown = reached[test[reached] | hole[reached]]
        node_at[start[shown]] = shown
        placed = np.flatnonzero(node_at >= 0)
        written = node_at[placed]
        is_hole = hole[written]
        own, holes = written[~is_hole], written[is_hole]
        text = np.empty(len(node_at), dtype=object)
        text[start[own]] = splits.opening[own]
        text[start[own] + 1] = splits.operand[own]
        text[start[holes] + 1] = _separators(int(after[holes].max()))[after[holes]]
        self._hole_at = placed[is_hole]
        self.holes = holes
        self._text = text
        self._ends = np.cumsum(pieces[by_level[0]])
        self._begins = self._ends - pieces[by_level[0]]
        self._hole_ends = np.searchsorted(self._hole_at, self._ends)

    def render_root(self, i: int, leaf_value: LeafValue, offset: int = 0) -> str:
        """The text from root i, holes filled with `leaf_value(node - offset)`."""
        pieces, _ = self._filled(range(i, i + 1),
                                 lambda nodes: leaf_literals(leaf_value, nodes - offset))
        return "".join(pieces)

    def render_roots(self, roots: range, texts: np.ndarray) -> list[str]:
        """The text from each of `roots` (consecutive), holes filled with `texts[node]`
        (an object array by node id): one fill and one list for all of them, where
        `render_root` would copy and fill per root."""
        if not roots:
            return []
        pieces, begin = self._filled(roots, texts.__getitem__)
        return ["".join(pieces[int(self._begins[i]) - begin:int(self._ends[i]) - begin])
                for i in roots]

    def _filled(self, roots: range, literals: Callable[[np.ndarray], object],
                ) -> tuple[list[str], int]:
        """The pieces from the first of `roots` to the end of the last, holes filled with
        `literals(hole nodes)`, and where they begin in the layout. The holes are filled
        in place: every hole in the range is filled each time, so no copy is needed."""
        begin, end = int(self._begins[roots.start]), int(self._ends[roots.stop - 1])
        first = int(self._hole_ends[roots.start - 1]) if roots.start else 0
        last = int(self._hole_ends[roots.stop - 1])
        self._text[self._hole_at[first:last]] = literals(self.holes[first:last])
        return self._text[begin:end].tolist(), begin


def nested_case(tree: Tree, splits: Splits, leaf_value: LeafValue, root: int = 0,
                levels: int | None = None) -> str:
    """Render a tree (or its top `levels` below `root`). A leaf, or a node `levels` below
    `root`, ends its branch with `leaf_value(node)`; the depth-staged and array shapes use
    the cut to emit the node id reached."""
    return CaseText(tree, splits, (root,), levels).render_root(0, leaf_value)


def every_tree(ctx: Context) -> tuple[CaseText, np.ndarray]:
    """Every tree's nested CASE laid out in one pass, and each tree's node offset in it
    (for `CaseText.render_root`)."""
    stacked, bound, offsets = side_by_side(ctx.forest, ctx.bounds)
    return CaseText(stacked, split_conditions(ctx, stacked, bound), offsets), offsets


class NestedCase(Strategy):
    name = "nested_case"
    summary = "one nested CASE expression per tree"

    def __init__(self) -> None:
        self._cases: tuple[CaseText, np.ndarray] | None = None

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        if self._cases is None:
            self._cases = every_tree(ctx)
        cases, offsets = self._cases
        return cases.render_root(tree_index, leaf_value, int(offsets[tree_index]))

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        """Every node written once per output; CASE nests as deep as the deepest tree."""
        internal = sum(int((tree.left != LEAF).sum()) for tree in forest.trees)
        leaves = forest.n_nodes - internal
        per_output = (internal * (50 + 2 * feature_bytes(profile, forest)
                                  + literal_bytes(profile))
                      + leaves * literal_bytes(profile) + 8 * len(forest.trees))
        depth = forest.depth()
        return Needs(per_output * forest.n_outputs + 200 * forest.n_features + 4000,
                     case_depth=depth, expression_depth=2 * depth + 6,
                     select_columns=forest.n_features + 4)

