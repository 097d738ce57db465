"""The seam between the neutral model and a SQL shape.

A strategy decides how each tree's leaf is found in SQL. The compiler around it owns the
rest (input casting, missing values, refused rows, averaging in tree order, labels), so
every strategy shares one set of exactness rules and goes through the same verifier.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.errors import UserError
from tree2sql.exact import bounds, integer_texts, repeated
from tree2sql.forest import Forest
from tree2sql.shortest import shortest_texts

LeafValue = Callable[[int], str]  # node id of a leaf -> SQL literal for that leaf


class LeafLiterals:
    """A LeafValue over per-node numbers (`values[n]`, leaves used), written in bulk.

    Calling it gives the leaf's literal, as any LeafValue; the literals of a whole tree
    are made in one `Profile.doubles` pass on first use instead of one call per leaf.
    `plain` says each literal reads back with float() as exactly its value, so a shape
    may write `values` itself (text_arrays) without making literals at all.
    """

    def __init__(self, values: np.ndarray, literals: Callable[[np.ndarray], Sequence[str]],
                 is_leaf: np.ndarray, plain: bool) -> None:
        self.values, self.plain = values, plain
        self._make, self._is_leaf = literals, is_leaf
        self._literals: np.ndarray | None = None  # object array by node id

    def __call__(self, node: int) -> str:
        literal = self._table()[node]
        return self._make(self.values[node:node + 1])[0] if literal is None else literal

    def at(self, nodes: np.ndarray) -> np.ndarray:
        """The literals of `nodes` (leaves, or nodes where a shape cut the tree), in bulk,
        as an object array (what the shapes place them in)."""
        found = self._table()[nodes]
        missing = np.flatnonzero(~self._is_leaf[nodes])
        if missing.size:  # not leaves: made on their own
            found[missing] = self._make(self.values[nodes[missing]])
        return found

    def _table(self) -> np.ndarray:
        """Literal by node id (None at split nodes), made on first use."""
        if self._literals is None:
            self._literals = np.full(len(self._is_leaf), None, dtype=object)
            leaves = np.flatnonzero(self._is_leaf)
            self._literals[leaves] = self._make(self.values[leaves])
        return self._literals


def leaf_literals(leaf_value: LeafValue, nodes: np.ndarray) -> np.ndarray:
    """`leaf_value` of each node, as an object array: in bulk where it is a LeafLiterals."""
    if isinstance(leaf_value, LeafLiterals):
        return leaf_value.at(nodes)
    texts = np.empty(len(nodes), dtype=object)
    texts[:] = list(map(leaf_value, nodes.tolist()))
    return texts


class LiteralTable:
    """Literals of a known set of doubles, made in one bulk pass on first use, then
    looked up.

    Each bulk pass has a fixed cost, so a forest's thresholds, or its leaf values, are
    formatted once rather than tree by tree. A value outside the set is made on its own
    (a non-finite one raises, as `make` does).
    """

    def __init__(self, make: Callable[[np.ndarray], Sequence[str]], values: np.ndarray) -> None:
        floats = np.asarray(values, dtype=np.float64).ravel()
        self._make, self._values = make, floats[np.isfinite(floats)]
        self._table: tuple[np.ndarray, np.ndarray] | None = None  # (bit patterns, texts)

    def __call__(self, values: np.ndarray) -> Sequence[str]:
        """The literals of `values`, as an object array where they come from the table."""
        if self._table is None:
            known = np.unique(self._values.view(np.int64))
            self._table = known, np.array(self._make(known.view(np.float64)), dtype=object)
        known, known_texts = self._table
        floats = np.asarray(values, dtype=np.float64).ravel()
        if not len(known):
            return self._make(floats)
        bits = floats.view(np.int64)
        at = np.minimum(np.searchsorted(known, bits), len(known) - 1)
        texts = known_texts[at]
        unknown = np.flatnonzero(known[at] != bits)
        if unknown.size:
            texts[unknown] = self._make(floats[unknown])
        return texts


@dataclass(frozen=True)
class Needs:
    """What a shape asks of an engine, for the planner to hold against the profile's limits.

    Figures are estimates meant as upper bounds: `case_depth` and `expression_depth` of
    the deepest expression the strategy writes (the compiler adds its own), the widest
    select list, whether the model's nodes are written into the statement itself, the
    parse tree's elements (None: estimated from the statement bytes), and the elements of
    constant arrays the engine parses while planning (once per reference).
    """

    statement_bytes: int
    case_depth: int = 1
    expression_depth: int = 4
    select_columns: int = 0
    inline: bool = True
    ast_elements: int | None = None
    constant_elements: int = 0  # array elements the engine reads while planning
    unsuitable: str | None = None  # why the shape cannot express this model at all


@dataclass
class Context:
    """What a strategy may use: the forest, the dialect, and the input relation.

    `source` is a relation with the pass-through key columns (`keys`, already quoted),
    the guard column `ok` and one double column per model feature (`features[i]`, with
    NULL for missing); for a shape that `reads_row_identity`, also the columns of the
    row's physical identity (`identity`). `bounds[t][n]` is node n's double bound in tree
    t (x <= bound goes left; see tree2sql.exact).
    """

    forest: Forest
    profile: Profile
    source: str
    keys: list[str]
    ok: str
    features: list[str]
    bounds: list[np.ndarray]
    identity: list[str]

    @classmethod
    def build(cls, forest: Forest, profile: Profile, source: str, keys: list[str], ok: str,
              features: list[str], identity: list[str]) -> Context:
        every = bounds(np.concatenate([tree.threshold for tree in forest.trees]),
                       forest.comparison)  # one pass for the forest, then a view per tree
        return cls(forest, profile, source, keys, ok, features, forest.by_tree(every), identity)

    def prefix(self, name: str) -> str:
        """A quoted internal name (never clashes with user columns, see compiler)."""
        return self.profile.quote(f"__t2s_{name}")


def require_keys(profile: Profile, keys: tuple[str, ...], shape: str) -> None:
    """Refuse a shape whose syntax the profile does not give (e.g. forced with --strategy)."""
    missing = [k for k in keys if k not in profile.raw]
    if missing:
        raise UserError(f"the {profile.name} profile has no {', '.join(missing)} "
                        f"for the {shape} shape",
                        "use another --strategy, or add the keys to the dialect profile")


def number_texts(values: np.ndarray) -> list[str]:
    """Each number's text: integers as they are, doubles as their shortest round-trip
    repr, +0.0 (the placeholder filling about half of a node array) as "0". Formatting is
    most of the compile time, so each distinct double is formatted once (leaf values
    repeat) and integers come from a table of their texts."""
    if values.dtype.kind != "f":
        return integer_texts(values).tolist()
    items = repeated("0", len(values))
    written = (values != 0) | np.signbit(values)
    distinct, where = np.unique(values[written].view(np.int64), return_inverse=True)
    items[written] = np.array(shortest_texts(distinct.view(np.float64)), dtype=object)[where]
    return items.tolist()


def number_texts_each(arrays: list[np.ndarray]) -> list[list[str]]:
    """`number_texts` of several arrays of one kind in a single pass: each pass has a fixed
    cost, and a forest has hundreds of node arrays."""
    if not arrays:
        return []
    texts = number_texts(np.concatenate(arrays))
    ends = np.cumsum([len(a) for a in arrays]).tolist()
    return [texts[begin:end] for begin, end in zip([0, *ends[:-1]], ends, strict=True)]


def array_from_numbers(profile: Profile, values: np.ndarray, element: str) -> str:
    """A constant array of `element`s parsed from one string literal (profile keys
    `array_text`, default `[{items}]`, and `array_from_text`): one constant for the
    engine to plan, however many numbers it holds."""
    return array_from_texts(profile, number_texts(values), element)


def array_from_texts(profile: Profile, items: list[str], element: str) -> str:
    """`array_from_numbers` over numbers already written (`number_texts`)."""
    text = profile.raw.get("array_text", "[{items}]").format(items=",".join(items))
    return profile.raw["array_from_text"].format(text=profile.string(text), element=element)


def literal_bytes(profile: Profile) -> int:
    """Length of the longest double literal the profile writes (17 digits, 3-digit exponent)."""
    return len(profile.double(-2.2250738585072014e-308))


def feature_bytes(profile: Profile, forest: Forest) -> int:
    """Length of the longest quoted internal feature column name."""
    return len(profile.quote(f"__t2s_f{forest.n_features}"))


class Strategy(ABC):
    """One SQL shape for evaluating trees. Subclasses register in strategies/__init__."""

    name: str = ""
    summary: str = ""
    # Its setup lives in the session only (e.g. session variables): no persisted view or
    # function can read it, so the planner passes it over for those.
    session_scoped: bool = False
    # It joins scans of the source on each row's physical identity (profile `row_identity`),
    # which only a stored table has: the planner takes it for a source checked to be one.
    reads_row_identity: bool = False

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        """Extra CTEs (name, SELECT body) after the input; the last one becomes the source."""
        return []

    def fenced_stages(self, ctx: Context) -> set[str]:
        """Names of its stages that later SQL reads a column of many times: the compiler
        fences them where the profile can (`cte_materialized`), so that an engine that
        inlines CTEs does not copy the column's expression into every reference."""
        return set()

    def inlined_stages(self, ctx: Context) -> set[str]:
        """Names of stages it reads several times that must still be computed where each
        read is (profile `cte_inlined`), not once into a store the reads share."""
        return set()

    def constants(self, ctx: Context) -> list[tuple[str, str]]:
        """Named constant expressions (name, SQL) the statement's WITH clause defines ahead
        of its CTEs, for profiles with `constant_alias`; stages and terms use the names."""
        return []

    @abstractmethod
    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        """SQL expression, over the (last stage's) source, giving the tree's leaf value."""

    def statement_size_estimate(self, forest: Forest) -> int:
        """Rough statement bytes, used by the planner to respect engine limits."""
        return 60 * forest.n_nodes * max(1, forest.n_outputs)

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        """Estimated demands on the engine (default: flat expressions, size estimate)."""
        return Needs(self.statement_size_estimate(forest), case_depth=1, expression_depth=8,
                     select_columns=len(forest.trees) + forest.n_features)

    def setup_statements(self, ctx: Context) -> list[str]:
        """Statements to run, in order, before the SELECT (e.g. create and fill a table)."""
        return []

    def group_columns(self, ctx: Context, trees: range) -> list[str] | None:
        """Select items (over the checked input) that the terms of `trees` read, which the
        compiler computes in a fenced stage next to those trees' partial sum and drops
        after it (tree2sql.compiler `_grouped_sums`). None: the terms read the strategy's
        own stages."""
        return None
