"""Each tree walked once by a nested CASE giving its leaf's number; every output then reads
the leaf's value from a constant array.

Why this shape (figures in benchmarks/README.md): a row engine (PostgreSQL) pays per node
visited per row, and `nested_case` walks every tree once per output column, so a binary
classifier walks each tree twice and a k-class one k times. Here the walk happens once, in
a stage of its own, and each output is one array subscript:

    leaf_t = CASE WHEN x3 <= b THEN CASE ... THEN 1 ELSE 2 END ELSE ... END
    p_k    = ... + CAST('{v_k(leaf 1), v_k(leaf 2), ...}' AS DOUBLE PRECISION[])[leaf_t] + ...

Leaves are numbered 1, 2, ... in node order. The leaf stage is fenced (profile key
`stage_fence`, written before its SELECT) so that the engine does not copy each CASE into
every output that reads it when it flattens the CTE.

Profile keys: `array_from_text` over {text} and {element}, `array_text` over {items}
(the array's text form, default `[{items}]`), `array_index` over {array} and {index},
`integer_type`, and optionally `stage_fence`.
"""

from __future__ import annotations

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.errors import UserError
from tree2sql.exact import integer_texts
from tree2sql.forest import LEAF, Forest
from tree2sql.strategies.base import (
    Context,
    LeafLiterals,
    LeafValue,
    Needs,
    Strategy,
    array_from_numbers,
    feature_bytes,
    literal_bytes,
    require_keys,
)
from tree2sql.strategies.nested_case import every_tree

REQUIRED_KEYS = ("array_from_text", "array_index", "integer_type")


class CaseLeaves(Strategy):
    name = "case_leaves"
    summary = ("one nested CASE per tree giving its leaf's number, walked once; each "
               "output reads the leaf's value from an array (row engines)")

    def _leaf(self, ctx: Context, t: int) -> str:
        return ctx.prefix(f"leaf{t}")

    @staticmethod
    def _leaf_numbers(ctx: Context, t: int) -> np.ndarray:
        """1-based leaf number by node id (0 at split nodes)."""
        is_leaf = ctx.forest.trees[t].left == LEAF
        return np.where(is_leaf, np.cumsum(is_leaf), 0)

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        return [(ctx.prefix("leaves"),
                 "".join(self.walk_stage(ctx, [*ctx.keys, ctx.ok], self.walks(ctx))))]

    def walks(self, ctx: Context) -> list[str]:
        """Each tree's walk as a select item `CASE ... END AS leaf_t`, in tree order."""
        require_keys(ctx.profile, REQUIRED_KEYS, self.name)
        cases, _ = every_tree(ctx)
        trees = range(len(ctx.forest.trees))
        numbers = integer_texts(np.concatenate([self._leaf_numbers(ctx, t) for t in trees]))
        return [f"{case} AS {self._leaf(ctx, t)}"
                for t, case in zip(trees, cases.render_roots(trees, numbers), strict=True)]

    @staticmethod
    def walk_stage(ctx: Context, columns: list[str], walks: list[str]) -> list[str]:
        """The pieces of a fenced SELECT of `columns` and `walks` over the source, for the
        caller to join once (the walks are megabytes; each copy costs fresh memory)."""
        parts = [ctx.profile.stage_fence(ctx.prefix("fence")), "SELECT "]
        for item in [*columns, *walks]:
            parts += [item, ",\n  "]
        parts[-1] = f"\nFROM {ctx.source}"
        return parts

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        p = ctx.profile
        leaves = np.flatnonzero(ctx.forest.trees[tree_index].left == LEAF)
        if isinstance(leaf_value, LeafLiterals):  # the numbers, not their SQL literals
            values = leaf_value.values[leaves]
            if not np.isfinite(values).all():
                raise UserError("a leaf value is not finite", "check the model's leaf values")
        else:  # e.g. leaf node ids, for locating disagreements
            values = np.array([float(leaf_value(node)) for node in leaves.tolist()])
        array = array_from_numbers(p, values, p.double_type)
        return p.raw["array_index"].format(array=array, index=self._leaf(ctx, tree_index))

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        """Every split written once; every leaf once as a number and once per output."""
        require_keys(profile, REQUIRED_KEYS, self.name)
        internal = sum(int((tree.left != LEAF).sum()) for tree in forest.trees)
        leaves = forest.n_nodes - internal
        size = (internal * (50 + 2 * feature_bytes(profile, forest) + literal_bytes(profile))
                + leaves * (8 + 25 * forest.n_outputs) + 200 * len(forest.trees)
                + 200 * forest.n_features + 4000)
        depth = forest.depth()
        return Needs(size, case_depth=depth, expression_depth=2 * depth + 6,
                     select_columns=len(forest.trees) + forest.n_features + 4)
