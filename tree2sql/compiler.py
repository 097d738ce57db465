"""Forest + column map + dialect -> one SELECT statement.

The compiler owns every exactness rule that does not depend on the SQL shape: casting
each input column to double once, NaN and NULL as missing, NULL scores for rows the
model refuses or cannot take, the sum over trees in tree order followed by one division,
and the library's argmax rule for the label. A strategy only says how a tree finds its leaf.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from enum import Enum

import numpy as np

from tree2sql import __version__
from tree2sql.dialects import Profile, load_profile
from tree2sql.errors import UserError
from tree2sql.exact import FLOAT32_OVERFLOW
from tree2sql.forest import Forest
from tree2sql.strategies import Context, Strategy, choose

INTERNAL_PREFIX = "__t2s_"
PLUS = "\n    + "
TERMS_PER_STAGE = 100  # trees summed per CTE stage; see _partial_sum_stages
CAUTION = ("Scores can decide things about people: verify this SQL against the model "
           "(tree2sql verify) before use, keep model and SQL under review, and follow your "
           "organisation's model-risk practice and local rules.")


class Combine(Enum):
    """How per-tree outputs become the forest's output."""

    AVERAGE = "average"  # mean of per-tree probabilities/values (scikit-learn's rule)
    MAJORITY = "majority"  # each tree votes its top class; ties go to the first class


@dataclass(frozen=True)
class ScoringRequest:
    """What the user asked for: the table, its keys, the column map and output naming."""

    table: str
    keys: Sequence[str] = ()
    columns: Mapping[str, str] = field(default_factory=dict)  # feature name -> column
    prefix: str = "score_"
    combine: Combine = Combine.AVERAGE
    strategy: str | None = None


@dataclass(frozen=True)
class CompiledQuery:
    sql: str
    dialect: str
    strategy: str
    reason: str
    output_columns: list[str]  # keys first, then score columns, in SELECT order
    score_columns: list[str]
    label_column: str | None
    feature_columns: list[str]  # table column per model feature, in model order


def feature_columns(forest: Forest, columns: Mapping[str, str]) -> list[str]:
    """Table column per model feature: the model's own names unless mapped explicitly."""
    unknown = sorted(set(columns) - set(forest.feature_names))
    if unknown:
        raise UserError("the column map names features the model does not have: "
                        + ", ".join(map(repr, unknown)),
                        "model features are: " + ", ".join(map(repr, forest.feature_names)))
    return [columns.get(name, name) for name in forest.feature_names]


def score_column_names(forest: Forest, prefix: str) -> tuple[list[str], str | None]:
    """Readable output names: `<prefix>prob_<label>` per class and `<prefix>class`.

    Labels that would give the same name once case is folded (engines differ on case)
    get their class position appended, so every output column stays distinct.
    """
    if not forest.is_classifier:
        return [f"{prefix}value"], None
    names = [f"{prefix}prob_{label}" for label in forest.classes]
    folded = [n.casefold() for n in names]
    names = [f"{n}_{i}" if folded.count(n.casefold()) > 1 else n for i, n in enumerate(names)]
    return names, f"{prefix}class"


def compile_forest(forest: Forest, request: ScoringRequest, dialect: str = "duckdb",
                   progress: Callable[[int], None] | None = None) -> CompiledQuery:
    profile = load_profile(dialect)
    features = feature_columns(forest, request.columns)
    scores, label = score_column_names(forest, request.prefix)
    outputs = [*request.keys, *scores, *([label] if label else [])]
    _check_names(request, outputs)
    strategy, reason = choose(forest, profile, request.strategy)
    builder = _QueryBuilder(forest, profile, request, features, strategy)
    sql = builder.render(scores, label, progress)
    header = (f"-- tree2sql {__version__}: {forest.source}\n"
              f"-- model fingerprint sha256:{forest.fingerprint()}\n"
              f"-- dialect {profile.name}, strategy {strategy.name}, "
              f"combine {request.combine.value}\n"
              f"-- {CAUTION}\n")
    return CompiledQuery(header + sql, profile.name, strategy.name, reason, outputs,
                         scores, label, features)


def compile_leaf_ids(forest: Forest, request: ScoringRequest, dialect: str = "duckdb") -> str:
    """Keys plus each tree's leaf node id (`__t2s_leaf<t>`): for locating disagreements."""
    profile = load_profile(dialect)
    strategy, _ = choose(forest, profile, request.strategy)
    builder = _QueryBuilder(forest, profile, request,
                            feature_columns(forest, request.columns), strategy)
    return builder.render_leaf_ids()


def _check_names(request: ScoringRequest, outputs: list[str]) -> None:
    for name in [*request.keys, *request.columns.values(), request.table]:
        if str(name).startswith(INTERNAL_PREFIX):
            raise UserError(f"the name {name!r} starts with {INTERNAL_PREFIX!r}, which "
                            "tree2sql keeps for its own intermediate columns",
                            "rename the column or use a view with another name")
    folded = [n.casefold() for n in outputs]
    clashes = sorted({n for n in outputs if folded.count(n.casefold()) > 1})
    if clashes:
        raise UserError("output column names clash: " + ", ".join(map(repr, clashes)),
                        "choose another --prefix or key column")


class _QueryBuilder:
    def __init__(self, forest: Forest, profile: Profile, request: ScoringRequest,
                 features: list[str], strategy: Strategy) -> None:
        self.forest, self.profile, self.request = forest, profile, request
        self.strategy = strategy
        self.feature_columns = features
        q = profile.quote
        self.keys = [q(k) for k in request.keys]
        self.internal = lambda name: q(INTERNAL_PREFIX + name)
        self.features = [self.internal(f"f{i}") for i in range(forest.n_features)]

    def render(self, scores: list[str], label: str | None,
               progress: Callable[[int], None] | None) -> str:
        p, ok = self.profile, self.internal("ok")
        ctx = self._context()
        ctes = [*self._input_stages(), *self.strategy.stages(ctx)]
        sums = self._sums(ctx, progress)
        ctes += self._partial_sum_stages(sums, ctes[-1][0])
        source = ctes[-1][0]
        divisor = p.double(len(self.forest.trees))
        means = [f"CASE WHEN {ok} = 1 THEN ({s[-1]}) / {divisor} END AS {self.internal(f'p{k}')}"
                 for k, s in enumerate(sums)]
        ctes.append((self.internal("scores"),
                     f"SELECT {self._select_list(self.keys + means)}\nFROM {source}"))
        final = self.keys + [f"{self.internal(f'p{k}')} AS {p.quote(name)}"
                             for k, name in enumerate(scores)]
        if label:
            final.append(f"{self._argmax()} AS {p.quote(label)}")
        with_clause = ",\n".join(f"{name} AS (\n{body}\n)" for name, body in ctes)
        return (f"WITH {with_clause}\nSELECT {self._select_list(final)}\n"
                f"FROM {self.internal('scores')}")

    def render_leaf_ids(self) -> str:
        ctx = self._context()
        ctes = [*self._input_stages(), *self.strategy.stages(ctx)]
        leaves = [f"{self.strategy.tree_term(ctx, t, str)} AS {self.internal(f'leaf{t}')}"
                  for t in range(len(self.forest.trees))]
        with_clause = ",\n".join(f"{name} AS (\n{body}\n)" for name, body in ctes)
        return (f"WITH {with_clause}\nSELECT {self._select_list(self.keys + leaves)}\n"
                f"FROM {ctes[-1][0]}")

    def _context(self) -> Context:
        return Context.build(self.forest, self.profile, self.internal("checked"), self.keys,
                             self.internal("ok"), self.features)

    def _input_stages(self) -> list[tuple[str, str]]:
        return [(self.internal("input"), self._input_body()),
                (self.internal("checked"), self._guard_body())]

    @staticmethod
    def _select_list(items: list[str]) -> str:
        return ",\n  ".join(items)

    def _input_body(self) -> str:
        p = self.profile
        cast = [f"{p.missing_as_null(p.cast_double(p.quote(col)))} AS {alias}"
                for col, alias in zip(self.feature_columns, self.features, strict=True)]
        return (f"SELECT {self._select_list(self.keys + cast)}\n"
                f"FROM {p.qualified(self.request.table)}")

    def _guard_body(self) -> str:
        """ok = 1 when the library would score the row, else 0 (its scores become NULL)."""
        limit = self.profile.double(FLOAT32_OVERFLOW)
        refused = [f"ABS({f}) >= {limit}" for f in self.features]
        if not self.forest.accepts_missing:
            refused += [f"{f} IS NULL" for f in self.features]
        guard = f"CASE WHEN {' OR '.join(refused)} THEN 0 ELSE 1 END AS {self.internal('ok')}"
        return f"SELECT *, {guard}\nFROM {self.internal('input')}"

    def _sums(self, ctx: Context, progress: Callable[[int], None] | None) -> list[list[str]]:
        """Per output, the per-tree terms in tree order."""
        leaf_values = self._leaf_value_functions()
        terms: list[list[str]] = [[] for _ in leaf_values]
        for t in range(len(self.forest.trees)):
            for k, leaf_value in enumerate(leaf_values):
                terms[k].append(self.strategy.tree_term(ctx, t, leaf_value(t)))
            if progress:
                progress(1)
        return terms

    def _partial_sum_stages(self, terms: list[list[str]], source: str) -> list[tuple[str, str]]:
        """Sum left to right in tree order, `TERMS_PER_STAGE` trees per CTE stage.

        One long `a + b + c ...` is as deep as it is long, and engines cap expression
        depth (DuckDB: 1000). Carrying a running sum from stage to stage keeps the exact
        left-to-right order of the library's accumulation while bounding the depth.
        On return each `terms[k]` is replaced by [final sum expression].
        """
        stages: list[tuple[str, str]] = []
        n_trees = len(terms[0])
        if n_trees <= TERMS_PER_STAGE:
            for column in terms:
                column[:] = [PLUS.join(column)]
            return stages
        running: list[str | None] = [None] * len(terms)
        for stage, start in enumerate(range(0, n_trees, TERMS_PER_STAGE)):
            items = []
            for k, column in enumerate(terms):
                chunk = column[start:start + TERMS_PER_STAGE]
                if running[k] is not None:
                    chunk = [running[k], *chunk]
                name = self.internal(f"s{stage}_{k}")
                items.append(f"{PLUS.join(chunk)} AS {name}")
                running[k] = name
            name = self.internal(f"sum{stage}")
            body = f"SELECT *,\n  {self._select_list(items)}\nFROM {source}"
            stages.append((name, body))
            source = name
        for k, column in enumerate(terms):
            column[:] = [running[k]]
        return stages

    def _leaf_value_functions(self) -> list[Callable[[int], Callable[[int], str]]]:
        """Per output column: tree index -> (leaf node -> SQL literal)."""
        trees, double = self.forest.trees, self.profile.double
        if self.request.combine is Combine.MAJORITY:
            if not self.forest.is_classifier:
                raise UserError("majority voting needs a classifier",
                                "drop --combine majority for a regressor")
            votes = [np.argmax(tree.value, axis=1) for tree in trees]
            return [lambda t, k=k: (lambda n: "1" if votes[t][n] == k else "0")
                    for k in range(self.forest.n_outputs)]
        return [lambda t, k=k: (lambda n: double(trees[t].value[n, k]))
                for k in range(self.forest.n_outputs)]

    def _argmax(self) -> str:
        """First class with the largest probability, NULL when the scores are NULL."""
        p = [self.internal(f"p{k}") for k in range(self.forest.n_outputs)]
        labels = [self.profile.label(c) for c in self.forest.classes]
        branches = [f"WHEN {p[0]} IS NULL THEN NULL"]
        for k in range(len(p) - 1):
            beats_rest = " AND ".join(f"{p[k]} >= {other}" for other in p[k + 1:])
            branches.append(f"WHEN {beats_rest} THEN {labels[k]}")
        return f"CASE {' '.join(branches)} ELSE {labels[-1]} END"
