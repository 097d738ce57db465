"""Trees as node arrays, walked one level per CTE stage.

Each tree is renumbered root first (pre-order), so a node's left child is the next node.
A one-row CTE holds per tree four arrays: the feature slot tested, the double bound, the
right child and the child taken by a missing value. Every row carries its features as an
array plus one node id per tree; each stage moves every tree one level down:

    n = CASE WHEN x[feature[n]] IS NULL THEN missing[n]
             WHEN x[feature[n]] <= bound[n] THEN n + 1 ELSE right[n] END

Leaves test an extra, always-NULL slot and send missing values to themselves, so a tree
that reached its leaf stays there while deeper trees go on. Vectorized engines evaluate
this per vector of rows at a fixed cost per tree and level, instead of per node of the
forest as a nested CASE costs them.

The dialect profile supplies the array syntax: `array_literal` over {items} and
`array_index` over {array} and {index} (1-based indexes).
"""

from __future__ import annotations

import numpy as np

from tree2sql.forest import LEAF, Forest, Tree
from tree2sql.strategies.base import Context, LeafValue, Strategy, require_keys

DOUBLE_MAX = float(np.finfo(np.float64).max)
REQUIRED_KEYS = ("array_literal", "array_index")


def preorder_layout(tree: Tree) -> tuple[np.ndarray, np.ndarray]:
    """(order, position): order[i] is the node at 1-based slot i+1; position inverts it."""
    order = np.array(tree.preorder(), dtype=np.int64)
    position = np.empty_like(order)
    position[order] = np.arange(1, len(order) + 1)
    return order, position


class NodeArrays(Strategy):
    name = "node_arrays"
    summary = "per-tree node arrays, one CTE stage per tree level (vectorized engines)"

    def __init__(self) -> None:
        self._layouts: dict[int, tuple[np.ndarray, np.ndarray]] = {}

    def _layout(self, ctx: Context, t: int) -> tuple[np.ndarray, np.ndarray]:
        if t not in self._layouts:
            self._layouts[t] = preorder_layout(ctx.forest.trees[t])
        return self._layouts[t]

    def _array(self, ctx: Context, items: list[str]) -> str:
        return ctx.profile.raw["array_literal"].format(items=", ".join(items))

    def _index(self, ctx: Context, array: str, index: str) -> str:
        return ctx.profile.raw["array_index"].format(array=array, index=index)

    def _name(self, ctx: Context, what: str, t: int) -> str:
        return ctx.prefix(f"{what}{t}")

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        require_keys(ctx.profile, REQUIRED_KEYS, self.name)
        forest, p = ctx.forest, ctx.profile
        null_slot = len(ctx.features) + 1  # after the inputs and any derived ones
        model_columns = []
        for t, tree in enumerate(forest.trees):
            order, position = self._layout(ctx, t)
            leaf = tree.left[order] == LEAF
            bound = np.clip(ctx.bounds[t][order], -DOUBLE_MAX, DOUBLE_MAX)
            feature = np.where(leaf, null_slot, tree.feature[order] + 1)
            right = np.where(leaf, np.arange(1, len(order) + 1),
                             position[np.where(leaf, 0, tree.right[order])])
            left = np.where(leaf, 0, position[np.where(leaf, 0, tree.left[order])])
            goes_left = tree.missing_left[order] & forest.accepts_missing
            missing = np.where(leaf, np.arange(1, len(order) + 1),
                               np.where(goes_left, left, right))
            # A +inf bound sends every value left, +inf included; DOUBLE_MAX would not.
            right = np.where(np.isposinf(ctx.bounds[t][order]) & ~leaf, left, right)
            columns = {
                "feature": [str(v) for v in feature.tolist()],
                "bound": p.doubles(np.where(leaf, 0.0, bound)),
                "right": [str(v) for v in right.tolist()],
                "missing": [str(v) for v in missing.tolist()],
            }
            for what, items in columns.items():
                model_columns.append(f"{self._array(ctx, items)} AS {self._name(ctx, what, t)}")
        model = ctx.prefix("model")
        x = ctx.prefix("x")
        row_array = self._array(ctx, [*ctx.features, f"CAST(NULL AS {p.double_type})"])
        start = [f"1 AS {self._name(ctx, 'n', t)}" for t in range(len(forest.trees))]
        stages = [
            (model, "SELECT " + ",\n  ".join(model_columns)),
            (ctx.prefix("walk0"),
             "SELECT " + ",\n  ".join([*ctx.keys, ctx.ok, f"{row_array} AS {x}", *start])
             + f"\nFROM {ctx.source}"),
        ]
        depth = forest.depth()
        for level in range(1, depth + 1):
            steps = [f"{self._step(ctx, t)} AS {self._name(ctx, 'n', t)}"
                     for t in range(len(forest.trees))]
            stages.append((
                ctx.prefix(f"walk{level}"),
                "SELECT " + ",\n  ".join([*ctx.keys, ctx.ok, x, *steps])
                + f"\nFROM {stages[-1][0]} CROSS JOIN {model}",
            ))
        return stages

    def _step(self, ctx: Context, t: int) -> str:
        n = self._name(ctx, "n", t)
        value = self._index(ctx, ctx.prefix("x"),
                            self._index(ctx, self._name(ctx, "feature", t), n))
        return (f"CASE WHEN {value} IS NULL THEN "
                f"{self._index(ctx, self._name(ctx, 'missing', t), n)} "
                f"WHEN {value} <= {self._index(ctx, self._name(ctx, 'bound', t), n)} "
                f"THEN {n} + 1 ELSE {self._index(ctx, self._name(ctx, 'right', t), n)} END")

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        order, _ = self._layout(ctx, tree_index)
        tree = ctx.forest.trees[tree_index]
        is_leaf = (tree.left[order] == LEAF).tolist()
        items = [leaf_value(node) if leaf else "0"
                 for node, leaf in zip(order.tolist(), is_leaf, strict=True)]
        return self._index(ctx, self._array(ctx, items), self._name(ctx, "n", tree_index))

    def statement_size_estimate(self, forest: Forest) -> int:
        depth = forest.depth()
        return 90 * forest.n_nodes + 200 * len(forest.trees) * (depth + forest.n_outputs)

