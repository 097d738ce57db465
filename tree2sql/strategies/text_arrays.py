"""Trees walked one level per CTE stage over per-tree node arrays parsed from text.

Why this shape (figures in benchmarks/README.md):

* A list literal costs DuckDB far more to plan than to run, since every element is an
  expression for the parser, binder and optimizer. Here every node array is ONE string
  literal cast to a list, so the planner folds one constant per array.
* The arrays are per tree: a gather from a constant list copies that list once per vector,
  so one array for the whole forest is slow, and small ones are cheap.
* They come in through one cross join with a one-row model relation and are carried from
  stage to stage as columns (a cross join per stage costs planning time per stage). An
  engine that copies a cross-joined array into every row (ClickHouse) names them instead
  as constants of the WITH clause (profile key `constant_alias`); nothing is carried.
* Optionally the top `top_levels` levels are a small nested CASE in the first stage, saving
  that many stages. Measured on DuckDB this loses (a nested CASE is slow to plan), so the
  default is 0: every level is one CTE stage of gathers.

Each row carries its features twice in one array, with missing values replaced by a value
that decides the split by itself, then one always-undecided slot:

    xs = [x1 .. xk with NULL -> -inf,  x1 .. xk with NULL -> NaN,  NaN]

A node's `slot` picks the copy that matches its missing direction: -inf <= any bound sends
a missing value left; NaN <= any bound is false (DuckDB orders NaN above every value,
+inf included), sending it right. A leaf reads the last slot and has itself as right child,
so a tree that reached a leaf stays there while deeper trees go on. Node ids are 1-based
positions root first (pre-order), so a left child is the next id:

    n = CASE WHEN xs[slot[n]] <= bound[n] THEN n + 1 ELSE right[n] END

Profile keys: `array_from_text` over {text} (a quoted string literal) and {element},
`array_literal` over {items}, `array_index` over {array} and {index}, `integer_type`,
`nan_literal` and `infinity_literal`; optionally `constant_alias` over {value} and {name},
or `arrays_at_each_use` (Spark: each array written where a step reads it, nothing carried).
"""

from __future__ import annotations

import math

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.errors import UserError
from tree2sql.forest import LEAF, Forest, Tree
from tree2sql.strategies.base import (
    Context,
    LeafLiterals,
    LeafValue,
    Needs,
    Strategy,
    array_from_numbers,
    array_from_texts,
    number_texts_each,
    require_keys,
)
from tree2sql.strategies.nested_case import nested_case, split_conditions

TREES_PER_PASS = 25  # trees whose node arrays are written in one pass (_model_arrays)
TOP_LEVELS = 0  # levels rendered as nested CASE; measured choice, see benchmarks/README.md
QUOTE_MARK = "0x0"  # stands for a tree number inside a quoted template name
REQUIRED_KEYS = ("array_from_text", "array_literal", "array_index", "integer_type",
                 "nan_literal", "infinity_literal")


def stage_constants(profile: Profile, named: list[tuple[str, str]]) -> str:
    """A stage's own WITH clause naming `named` (name, value) constants (profile key
    `constant_alias`), ahead of its SELECT; empty when there are none."""
    if not named:
        return ""
    return "WITH " + ",\n".join(profile.raw["constant_alias"].format(value=value, name=name)
                               for name, value in named) + "\n"


def preorder_positions(tree: Tree, depth: np.ndarray | None = None,
                       ) -> tuple[np.ndarray, np.ndarray]:
    """(order, position): order[i] is the node at position i (root first, left subtree
    before right); position inverts it. scikit-learn already numbers trees this way, which
    is recognised without a per-node walk. `depth`: the tree's node depths, if known."""
    internal = np.flatnonzero(tree.left != LEAF)
    depth = tree.node_depths() if depth is None else depth
    if np.array_equal(tree.left[internal], internal + 1) and _right_follows_left(tree, depth):
        identity = np.arange(tree.n_nodes, dtype=np.int64)
        return identity, identity
    order = np.array(tree.preorder(), dtype=np.int64)
    position = np.empty_like(order)
    position[order] = np.arange(tree.n_nodes)
    return order, position


def _right_follows_left(tree: Tree, depth: np.ndarray) -> bool:
    """Each right child comes right after its left sibling's subtree."""
    internal = np.flatnonzero(tree.left != LEAF)
    if not (np.all(tree.left[internal] > internal) and np.all(tree.right[internal] > internal)):
        return False
    size = np.ones(tree.n_nodes, dtype=np.int64)
    for level in range(int(depth.max()), -1, -1):  # children first, one numpy step per level
        nodes = internal[depth[internal] == level]
        size[nodes] = 1 + size[tree.left[nodes]] + size[tree.right[nodes]]
    return bool(np.array_equal(tree.right[internal], internal + 1 + size[internal + 1]))


class TextArrays(Strategy):
    name = "text_arrays"
    summary = ("per-tree node arrays parsed from text, one CTE stage per level "
               "(vectorized engines)")

    def __init__(self, top_levels: int = TOP_LEVELS) -> None:
        self.top_levels = top_levels
        self._layouts: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        self._tree_depths: tuple[Forest, list[int]] | None = None  # see _depths
        self._quoted: dict[tuple[str, str], str] = {}
        self._written: dict[str, str] = {}  # array name -> its SQL (arrays_at_each_use)

    def _layout(self, forest: Forest, t: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(order, position, depth by node id) of tree t, computed once."""
        if t not in self._layouts:
            tree = forest.trees[t]
            depth = tree.node_depths()
            self._layouts[t] = (*preorder_positions(tree, depth), depth)
        return self._layouts[t]

    def _depths(self, forest: Forest) -> list[int]:
        """Each tree's depth, listed once per forest (every stage and term asks)."""
        if self._tree_depths is None or self._tree_depths[0] is not forest:
            self._tree_depths = (forest, forest.tree_depths())
        return self._tree_depths[1]

    def depth(self, forest: Forest) -> int:
        return max(self._depths(forest))

    def _carried(self, profile: Profile) -> bool:
        """The node arrays come in by a cross join and ride along as columns, unless the
        profile names them as constants or writes them where each step reads them."""
        return "constant_alias" not in profile.raw and not profile.raw.get("arrays_at_each_use")

    def _walked_levels(self, forest: Forest) -> int:
        return max(0, self.depth(forest) - self.top_levels)

    # -- SQL pieces -----------------------------------------------------------------------

    def _check(self, profile: Profile) -> None:
        require_keys(profile, REQUIRED_KEYS, self.name)

    def _array(self, ctx: Context, values: np.ndarray, element: str) -> str:
        return array_from_numbers(ctx.profile, values, element)

    def _index(self, ctx: Context, array: str, index: str) -> str:
        return ctx.profile.raw["array_index"].format(array=array, index=index)

    def _name(self, ctx: Context, what: str, t: int) -> str:
        """Quoted internal name; quoting through sqlglot once per kind keeps compiling fast
        (the names are plain ASCII, so the quoted template only needs its number)."""
        key = (ctx.profile.name, what)
        if key not in self._quoted:
            self._quoted[key] = ctx.prefix(f"{what}{QUOTE_MARK}")
        return self._quoted[key].replace(QUOTE_MARK, str(t))

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        self._check(ctx.profile)
        forest, p = ctx.forest, ctx.profile
        walked = self._walked_levels(forest)
        xs = ctx.prefix("xs")
        start = [f"{self._start(ctx, t)} AS {self._name(ctx, 'n', t)}"
                 for t in range(len(forest.trees))]
        if walked == 0:  # every tree fits in its CASE: no arrays needed
            return [(ctx.prefix("walk0"),
                     "SELECT " + ",\n  ".join([*ctx.keys, ctx.ok, *start])
                     + f"\nFROM {ctx.source}")]
        row = [*ctx.keys, ctx.ok, f"{self._row_array(ctx)} AS {xs}"]
        if not self._carried(p):
            stages = [(ctx.prefix("walk0"),
                       "SELECT " + ",\n  ".join([*row, *start]) + f"\nFROM {ctx.source}")]
            keep = [*ctx.keys, ctx.ok, xs]
        else:
            model = ctx.prefix("model")
            arrays = self._model_arrays(ctx)
            carried = [name for name, _ in arrays]
            stages = [
                (model, "SELECT " + ",\n  ".join(f"{value} AS {name}" for name, value in arrays)),
                (ctx.prefix("walk0"), "SELECT " + ",\n  ".join([*row, *carried, *start])
                 + f"\nFROM {ctx.source} CROSS JOIN {model}"),
            ]
            keep = [*ctx.keys, ctx.ok, xs, *carried]
        for level in range(1, walked + 1):
            stages.append((ctx.prefix(f"walk{level}"),
                           self._walk_stage(ctx, level, keep, stages[-1][0])))
        return stages

    def _walk_stage(self, ctx: Context, level: int, keep: list[str], source: str) -> str:
        """The stage taking every tree one level down from `source`. A tree stops stepping
        once every leaf of it is reached (its own depth), so a fully grown forest pays per
        tree for its own depth, not the deepest tree's."""
        steps = [self._step(ctx, t) if depth - self.top_levels >= level
                 else self._name(ctx, "n", t) for t, depth in enumerate(self._depths(ctx.forest))]
        return "SELECT " + ",\n  ".join([*keep, *steps]) + f"\nFROM {source}"

    def constants(self, ctx: Context) -> list[tuple[str, str]]:
        if "constant_alias" not in ctx.profile.raw or self._walked_levels(ctx.forest) == 0:
            return []
        return self._model_arrays(ctx)

    def _model_arrays(self, ctx: Context) -> list[tuple[str, str]]:
        """(name, array from text) for every tree's slot, bound and right-child arrays,
        their numbers written `TREES_PER_PASS` trees at a time (each pass has a fixed
        cost; the texts of a whole grown forest at once would hold millions of strings)."""
        element, trees = self._elements(ctx.profile), range(len(ctx.forest.trees))
        arrays = []
        for start in range(0, len(trees), TREES_PER_PASS):
            chunk = trees[start:start + TREES_PER_PASS]
            arrays += [(self._array_name(ctx, what, t),
                        array_from_texts(ctx.profile, items, element[what]))
                       for t, texts in zip(chunk, self._column_texts(ctx, chunk), strict=True)
                       for what, items in texts.items()]
        return arrays

    def _column_texts(self, ctx: Context, trees: range) -> list[dict[str, list[str]]]:
        """Per tree of `trees`, the number texts of its node arrays (`_node_columns`),
        written in one pass per kind of array."""
        columns = [self._node_columns(ctx, t) for t in trees]
        kinds = {what: number_texts_each([c[what] for c in columns]) for what in columns[0]}
        return [{what: kinds[what][i] for what in kinds} for i in range(len(columns))]

    def _array_name(self, ctx: Context, what: str, t: int) -> str:
        """Name of tree t's `what` array (a carried column or a named constant)."""
        return self._name(ctx, what, t)

    @staticmethod
    def _elements(profile: Profile) -> dict[str, str]:
        """SQL element type of each node array."""
        return {"slot": profile.raw["integer_type"], "bound": profile.array_double_type,
                "right": profile.raw["integer_type"]}

    def _node_columns(self, ctx: Context, t: int) -> dict[str, np.ndarray]:
        """Tree t's slot, bound and right-child arrays, by 1-based position in its layout
        (pre-order here; a leaf's right child is itself)."""
        tree, k = ctx.forest.trees[t], len(ctx.features)
        order, position, _ = self._layout(ctx.forest, t)
        leaf = tree.left[order] == LEAF
        own = np.arange(1, len(order) + 1)
        goes_left = tree.missing_left[order] & ctx.forest.accepts_missing
        return {
            "slot": np.where(leaf, 2 * k + 1, tree.feature[order] + 1 + np.where(goes_left, 0, k)),
            "bound": np.where(leaf, 0.0, ctx.bounds[t][order]),
            "right": np.where(leaf, own, position[np.where(leaf, 0, tree.right[order])] + 1),
        }

    def _row_array(self, ctx: Context) -> str:
        """The row's features twice (missing as -inf, then as NaN) and one NaN slot."""
        raw = ctx.profile.raw
        low, nan = f"-{raw['infinity_literal']}", raw["nan_literal"]
        row = ([f"COALESCE({x}, {low})" for x in ctx.features]
               + [f"COALESCE({x}, {nan})" for x in ctx.features] + [nan])
        return raw["array_literal"].format(items=", ".join(row))

    def _array_at(self, ctx: Context, what: str, t: int) -> str:
        """Tree t's `what` array where a step reads it: its name (a carried column or a
        named constant), or with `arrays_at_each_use` the array itself, which the engine
        folds to a constant once per use (Spark: nothing carried, no constant names)."""
        if not ctx.profile.raw.get("arrays_at_each_use"):
            return self._array_name(ctx, what, t)
        if not self._written:
            self._written = dict(self._model_arrays(ctx))
        return self._written[self._array_name(ctx, what, t)]

    def _step(self, ctx: Context, t: int) -> str:
        n = self._name(ctx, "n", t)
        slot = self._array_at(ctx, "slot", t)
        value = self._index(ctx, ctx.prefix("xs"), self._index(ctx, slot, n))
        bound = self._index(ctx, self._array_at(ctx, "bound", t), n)
        right = self._index(ctx, self._array_at(ctx, "right", t), n)
        return f"CASE WHEN {value} <= {bound} THEN {n} + 1 ELSE {right} END AS {n}"

    def _start(self, ctx: Context, t: int) -> str:
        """Position (1-based, less `_start_base`) of the node tree t reaches after its top
        levels: a nested CASE, or the root's position when no levels are rendered."""
        base = self._start_base(ctx, t)
        if self.top_levels == 0:
            return str(1 - base)
        tree = ctx.forest.trees[t]
        _, position, depth = self._layout(ctx.forest, t)
        top = np.flatnonzero((depth < self.top_levels) & (tree.left != LEAF))
        return nested_case(tree, split_conditions(ctx, tree, ctx.bounds[t], top),
                           lambda node: str(int(position[node]) + 1 - base),
                           levels=self.top_levels)

    def _start_base(self, ctx: Context, t: int) -> int:
        """What tree t's node column holds less than the position, before the walk (the
        walk ends at positions)."""
        return 0

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        order, _, _ = self._layout(ctx.forest, tree_index)
        leaf_mask = ctx.forest.trees[tree_index].left[order] == LEAF
        return self._index(ctx, self._leaf_array(ctx, order, leaf_mask, leaf_value),
                           self._name(ctx, "n", tree_index))

    def _leaf_array(self, ctx: Context, nodes: np.ndarray, leaf_mask: np.ndarray,
                    leaf_value: LeafValue) -> str:
        """Constant array of `leaf_value` at `nodes` (0 where `leaf_mask` is false): numbers
        from text where they are plain, else the literals themselves."""
        if isinstance(leaf_value, LeafLiterals) and leaf_value.plain:
            # The literals would read back as exactly these numbers: write them directly.
            numbers = np.where(leaf_mask, leaf_value.values[nodes], 0.0)
            if np.isfinite(numbers).all():
                return self._array(ctx, numbers, ctx.profile.array_double_type)
        items = [leaf_value(node) if leaf else "0"
                 for node, leaf in zip(nodes.tolist(), leaf_mask.tolist(), strict=True)]
        try:
            values = [float(item) for item in items]
        except ValueError:  # not plain numbers: keep the literals as SQL
            return ctx.profile.raw["array_literal"].format(items=", ".join(items))
        if not all(map(math.isfinite, values)):
            raise UserError("a leaf value is not finite", "check the model's leaf values")
        return self._array(ctx, np.array(values), ctx.profile.array_double_type)

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        self._check(profile)
        size = 45 * forest.n_nodes * (3 + max(1, forest.n_outputs)) \
            + 150 * len(forest.trees) * (self._walked_levels(forest) + 2 ** self.top_levels)
        levels = min(self.top_levels, self.depth(forest))
        # Each node array is one string literal to the parser: the parse tree grows with
        # trees x levels, not with the nodes.
        elements = 40 * forest.n_features + 20 * len(forest.trees) * (
            self._walked_levels(forest) + 2 ** self.top_levels + 2 + forest.n_outputs)
        return Needs(size, case_depth=levels + 1, expression_depth=2 * levels + 8,
                     select_columns=4 * len(forest.trees) + forest.n_features + 4,
                     ast_elements=elements,
                     constant_elements=self._parsed_elements(forest, profile))

    def _parsed_elements(self, forest: Forest, profile: Profile) -> int:
        """Array elements the engine parses while planning: named constants are parsed
        again at each reference, three arrays per step."""
        if "constant_alias" not in profile.raw:
            return 0
        return sum(3 * max(0, depth - self.top_levels) * tree.n_nodes
                   for depth, tree in zip(self._depths(forest), forest.trees, strict=True))
