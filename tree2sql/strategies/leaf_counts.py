"""Each tree walked once to its leaf's class counts packed in one integer; every class's
probability is then that count over the leaf's samples, by arithmetic.

Why (figures in benchmarks/README.md, SQLite): a row engine without arrays (SQLite) walks
each tree once per output with `nested_case`, so a binary classifier walks every tree
twice. A random forest's leaf holds exactly c_k / N for each class k: integer (bootstrap)
counts over the samples that reached it, one IEEE division made by the library. So one walk
can end in the integer

    code = N + c_1 * 2^b + c_2 * 2^(2b) + ... + c_0 * 2^(Kb)     (b bits per count)

and class k's value is `CAST((code >> kb) & m AS REAL) / (code & m)`, class 0's
`CAST(code >> Kb AS REAL) / (code & m)`, the same correctly rounded division. Where class
0's count does not fit as well, its value is N minus the others over N. The codes of each
group of trees are computed in a fenced stage and summed in the next
(Strategy.group_columns), and not carried further: storing them all in one stage cost
more than the second walk saved.

Profile key: `integer_bits = true` where the engine has the integer operators `>>` and `&`
(SQLite, DuckDB). Suits a forest whose every leaf passes that check exactly (the compiler
verifies it with numpy's own division; sample weights that are not whole numbers fail it)
and whose counts fit 62 bits; other models, and leaf values that are not class fractions
(votes, node ids, reason codes), get the plain nested CASE walk.
"""

from __future__ import annotations

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.exact import integer_texts, repeated
from tree2sql.forest import LEAF, Forest
from tree2sql.strategies.base import Context, LeafLiterals, LeafValue, Needs, require_keys
from tree2sql.strategies.nested_case import NestedCase, every_tree

PACKED_BITS = 62  # bits of a signed 64-bit integer the packed counts may use


def leaf_counts(forest: Forest) -> tuple[list[np.ndarray], int] | str:
    """Per tree, each leaf's packed code (0 at split nodes), and the bits per count; or why
    the forest's leaves are not exactly counts over samples. Every tree's leaves are
    checked and packed in one numpy pass."""
    if not forest.is_classifier or not forest.aggregation.mean:
        return "leaf_counts needs a forest classifier (mean of class fractions)"
    if any(tree.samples is None for tree in forest.trees):
        return "leaf_counts needs the samples per leaf, which this model does not record"
    leaves = [tree.left == LEAF for tree in forest.trees]
    value = np.concatenate([tree.value[leaf] for tree, leaf in zip(forest.trees, leaves,
                                                                   strict=True)])
    samples = np.rint(np.concatenate([tree.samples[leaf] for tree, leaf in zip(
        forest.trees, leaves, strict=True)]))
    counts = np.rint(value * samples[:, None])
    with np.errstate(divide="ignore", invalid="ignore"):
        exact = (counts / samples[:, None] == value).all()
    if not (exact and (samples >= 1).all() and (counts.sum(axis=1) == samples).all()):
        return "leaf_counts: a leaf's values are not whole counts over its samples"
    samples, counts = samples.astype(np.int64), counts.astype(np.int64)
    bits, classes = int(samples.max()).bit_length(), value.shape[1]
    if bits * classes > PACKED_BITS:
        return f"leaf_counts: {classes} counts of {bits} bits do not fit {PACKED_BITS} bits"
    code = samples.copy()
    for k in range(1, classes):
        code += counts[:, k] << (bits * k)
    if zero_on_top(bits, classes):
        code += counts[:, 0] << (bits * classes)
    packed = np.zeros(forest.n_nodes, dtype=np.int64)
    packed[np.concatenate(leaves)] = code
    return forest.by_tree(packed), bits


def zero_on_top(bits: int, classes: int) -> bool:
    """Whether class 0's count also fits, above the others: its decode is then one shift,
    where N minus the other counts takes a mask, a shift and a subtraction per class."""
    return bits * (classes + 1) <= PACKED_BITS


class LeafCounts(NestedCase):
    name = "leaf_counts"
    summary = ("each tree walked once to its leaf's packed class counts; probabilities by "
               "one division (row engines without arrays)")

    def __init__(self) -> None:
        super().__init__()
        self._counts: tuple[list[np.ndarray], int] | str | None = None
        self._code_texts: np.ndarray | None = None  # packed codes' texts by stacked node id

    def _packed(self, forest: Forest) -> tuple[list[np.ndarray], int] | str:
        if self._counts is None:
            self._counts = leaf_counts(forest)
        return self._counts

    def _code(self, ctx: Context, t: int) -> str:
        return ctx.prefix(f"code{t}")

    def group_columns(self, ctx: Context, trees: range) -> list[str] | None:
        packed = self._packed(ctx.forest)
        if isinstance(packed, str):
            return None
        if self._cases is None:
            self._cases = every_tree(ctx)
        if self._code_texts is None:  # every tree's leaf codes by node, written at once
            codes = np.concatenate(packed[0])
            leaves = np.flatnonzero(np.concatenate([t.left == LEAF for t in ctx.forest.trees]))
            self._code_texts = repeated("0", len(codes))
            self._code_texts[leaves] = integer_texts(codes[leaves])
        walks = self._cases[0].render_roots(trees, self._code_texts)
        return [f"{walk} AS {self._code(ctx, t)}" for t, walk in zip(trees, walks, strict=True)]

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        packed = self._packed(ctx.forest)
        value = ctx.forest.trees[tree_index].value
        classes = [k for k in range(value.shape[1]) if isinstance(leaf_value, LeafLiterals)
                   and np.array_equal(leaf_value.values, value[:, k])]
        if isinstance(packed, str) or not classes:
            return super().tree_term(ctx, tree_index, leaf_value)
        bits, k = packed[1], classes[0]
        code, mask = self._code(ctx, tree_index), (1 << bits) - 1
        samples = f"({code} & {mask})"
        count = [f"(({code} >> {bits * j}) & {mask})" for j in range(1, value.shape[1])]
        if k:
            numerator = count[k - 1]
        elif zero_on_top(bits, value.shape[1]):
            numerator = f"({code} >> {bits * value.shape[1]})"
        else:
            numerator = " - ".join([samples, *count])
        return f"CAST({numerator} AS {ctx.profile.double_type}) / {samples}"

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        """One walk per tree (nested_case walks once per output) and a short decode per
        tree and output."""
        require_keys(profile, ("integer_bits",), self.name)
        walks = super().needs(forest, profile)
        packed = self._packed(forest)
        return Needs(walks.statement_bytes // max(1, forest.n_outputs)
                     + 120 * len(forest.trees) * forest.n_outputs,
                     case_depth=walks.case_depth, expression_depth=walks.expression_depth,
                     select_columns=walks.select_columns + profile.trees_per_stage,
                     unsuitable=packed if isinstance(packed, str) else None)
