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
from tree2sql.forest import Forest, Link, Task
from tree2sql.input_sql import InputRenderer
from tree2sql.reasons import ReasonSql, check_reasons, reason_column_names
from tree2sql.strategies import Context, Strategy, choose
from tree2sql.strategies.base import LeafLiterals, LiteralTable

INTERNAL_PREFIX = "__t2s_"
PLUS = "\n    + "
# EXP's argument is kept within +-EXP_LIMIT: exp(700) ~ 1e304 stays finite and exp(-700) ~
# 1e-304 stays a normal double (no overflow/underflow errors, as PostgreSQL raises); past it
# a probability is within 1e-300 of 0 or 1.
EXP_LIMIT = 700.0
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
    reasons: int = 0  # K reason codes per row (tree2sql.reasons); 0 = none
    # The table is checked to be a stored one, whose rows have the profile's physical
    # `row_identity` (tree2sql.schema.with_row_identity): shapes that join on it may be used.
    row_identity: bool = False
    # A table of rows already scored, keyed like the source: source rows whose keys it
    # holds are left out before scoring (an incremental insert scores only new rows).
    scored_in: str | None = None


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
    # Statements to run first, in order (a strategy's model table); empty for most shapes.
    setup: tuple[str, ...] = ()
    reason_columns: tuple[str, ...] = ()  # (name, contribution) x K, after the scores

    @property
    def script(self) -> str:
        """Setup statements, then the SELECT: what `compile` prints and a DBA runs."""
        return "".join(f"{statement};\n\n" for statement in self.setup) + self.sql


def feature_columns(forest: Forest, columns: Mapping[str, str]) -> list[str]:
    """Table column per model input (a pipeline's raw columns, else the model's features):
    the model's own names unless mapped explicitly."""
    names = forest.input_names
    unknown = sorted(set(columns) - set(names))
    if unknown:
        raise UserError("the column map names features the model does not have: "
                        + ", ".join(map(repr, unknown)),
                        "model features are: " + ", ".join(map(repr, names)))
    return [columns.get(name, name) for name in names]


def text_columns(forest: Forest, columns: Mapping[str, str]) -> list[str]:
    """Table columns the SQL reads as text (they feed a pipeline's string encoders)."""
    if forest.inputs is None:
        return []
    return [c for c, text in zip(feature_columns(forest, columns), forest.inputs.text,
                                 strict=True) if text]


def score_column_names(forest: Forest, prefix: str) -> tuple[list[str], str | None]:
    """Readable output names: `<prefix>prob_<label>` per class and `<prefix>class`.

    Labels that would give the same name once case is folded (engines differ on case)
    get their class position appended, so every output column stays distinct.
    """
    if forest.task is Task.ANOMALY:
        return [f"{prefix}value", f"{prefix}decision"], None
    if not forest.is_classifier:
        return [f"{prefix}value"], None
    names = [f"{prefix}prob_{label}" for label in forest.classes]
    folded = [n.casefold() for n in names]
    names = [f"{n}_{i}" if folded.count(n.casefold()) > 1 else n for i, n in enumerate(names)]
    return names, f"{prefix}class"


def compile_forest(forest: Forest, request: ScoringRequest, dialect: str | Profile = "duckdb",
                   progress: Callable[[int], None] | None = None,
                   persistent: bool = False) -> CompiledQuery:
    """`dialect` is a profile name, or a Profile (e.g. one with tighter limits, for tests).
    `persistent`: the statement will live in a view or function (see `choose`)."""
    profile = dialect if isinstance(dialect, Profile) else load_profile(dialect)
    features = feature_columns(forest, request.columns)
    scores, label = score_column_names(forest, request.prefix)
    reasons = reason_column_names(request.prefix, request.reasons) if request.reasons else []
    if request.reasons:
        check_reasons(forest, request.reasons, request.combine is Combine.MAJORITY)
    outputs = [*request.keys, *scores, *([label] if label else []), *reasons]
    _check_names(request, outputs)
    strategy, reason = choose(forest, profile, request.strategy, persistent,
                              request.row_identity)
    builder = _QueryBuilder(forest, profile, request, features, strategy)
    header = (f"-- tree2sql {__version__}: {forest.source}\n"
              f"-- model fingerprint sha256:{forest.fingerprint()}\n"
              f"-- dialect {profile.name}, strategy {strategy.name}, "
              f"combine {request.combine.value}\n"
              f"-- {CAUTION}\n")
    sql = builder.render(header, scores, label, progress, reasons)
    setup = (*profile.session_settings,
             *strategy.setup_statements(builder._context()))
    return CompiledQuery(sql, profile.name, strategy.name, reason, outputs,
                         scores, label, features, setup, tuple(reasons))


def compile_leaf_ids(forest: Forest, request: ScoringRequest, dialect: str = "duckdb") -> str:
    """Keys plus each tree's leaf node id (`__t2s_leaf<t>`): for locating disagreements."""
    profile = load_profile(dialect)
    strategy, _ = choose(forest, profile, request.strategy, row_identity=request.row_identity)
    builder = _QueryBuilder(forest, profile, request,
                            feature_columns(forest, request.columns), strategy)
    return builder.render_leaf_ids()


def not_held(profile: Profile, table: str, keys: Sequence[str], row: str) -> str:
    """The condition that `table` holds no row with the keys of the row named `row`."""
    q, old = profile.quote, profile.quote(INTERNAL_PREFIX + "old")
    match = " AND ".join(f"{old}.{q(k)} = {row}.{q(k)}" for k in keys)
    return f"NOT EXISTS (SELECT 1 FROM {profile.qualified(table)} {old} WHERE {match})"


def _votes(values: np.ndarray) -> list[str]:
    """A vote (1.0 or 0.0) as the integer literal the majority sums add up."""
    return ["1" if v == 1.0 else "0" for v in values.tolist()]


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
        self.features = [self.internal(f"f{i}")
                         for i in range(forest.n_features + len(forest.derived))]
        self._built: Context | None = None
        self._checked_columns: list[str] = []  # the columns of the checked input stage
        self._group_stages: set[str] = set()  # stages of `_grouped_sums`, all fenced
        identity = profile.raw.get("row_identity", []) if strategy.reads_row_identity else []
        self.identity = [(expression, self.internal(f"row{i}"))
                         for i, expression in enumerate(identity)]

    def render(self, header: str, scores: list[str], label: str | None,
               progress: Callable[[int], None] | None, reasons: Sequence[str] = ()) -> str:
        """The statement, after `header` (its comment lines)."""
        p, ok = self.profile, self.internal("ok")
        ctx = self._context()
        ctes = [*self._input_stages(), *self.strategy.stages(ctx)]
        sums = self._sums(ctx, progress)
        sum_stages = self._partial_sum_stages(sums, ctes[-1][0], grouped=True)
        ctes += sum_stages
        explain = ReasonSql(self.forest, p, self.internal, self.request.reasons) \
            if reasons else None
        if explain:
            ctes.append(explain.leaf_stage(
                ctes[-1][0], lambda t, value: self.strategy.tree_term(ctx, t, value)))
            credit_sums = explain.terms()
            ctes += self._partial_sum_stages(credit_sums, ctes[-1][0], tag="rc_")
        source = ctes[-1][0]
        linked = self.forest.aggregation.link is not Link.IDENTITY
        raw_name = "r" if linked else "p"
        if self.forest.aggregation.mean:
            divisor = p.double(len(self.forest.trees))
            raws = [f"({s[-1]}) / {divisor}" for s in sums]
        else:
            raws = [s[-1] for s in sums]
        raws = [f"{p.guarded(ok, r)} AS {self.internal(f'{raw_name}{k}')}"
                for k, r in enumerate(raws)]
        if explain:
            raws += explain.credit_items(credit_sums, ok)
        ctes.append((self.internal("raw" if linked else "scores"),
                     f"SELECT {self._select_list(self.keys + raws)}\nFROM {source}"))
        if linked:
            ctes += self._link_stages()
        final = self.keys + [f"{self.internal(f'p{k}')} AS {p.quote(name)}"
                             for k, name in enumerate(scores)]
        if label:
            final.append(f"{self._label()} AS {p.quote(label)}")
        # The label (and a link) read each score several times; engines that inline CTEs
        # without common-subexpression elimination (PostgreSQL, SQLite) would otherwise
        # evaluate every tree sum once per reference: measured 3x slower on wine, 3 classes.
        last, fenced = self.internal("scores"), {self.internal("scores"), self.internal("raw")}
        named = set(p.raw.get("fenced_stages", ()))  # "sums": every partial-sum stage
        fenced |= {self.internal(name) for name in named - {"sums"}}
        fenced |= {name for name, _ in sum_stages} if "sums" in named else set()
        fenced |= self.strategy.fenced_stages(ctx) | self._group_stages
        if explain:
            ctes += explain.stages(last, lambda per_class: self._argmax("p", per_class))
            fenced |= set(explain.fenced)
            last = ctes[-1][0]
            final += explain.output_items(list(reasons))
        return self._statement(ctx, ctes, fenced, f"SELECT {self._select_list(final)}\nFROM {last}",
                               header)

    def render_leaf_ids(self) -> str:
        ctx = self._context()
        ctes = [*self._input_stages(), *self.strategy.stages(ctx)]
        leaves = [f"{self.strategy.tree_term(ctx, t, str)} AS {self.internal(f'leaf{t}')}"
                  for t in range(len(self.forest.trees))]
        return self._statement(ctx, ctes, self.strategy.fenced_stages(ctx),
                               f"SELECT {self._select_list(self.keys + leaves)}\n"
                               f"FROM {ctes[-1][0]}")

    def _statement(self, ctx: Context, ctes: list[tuple[str, str]], fenced: set[str],
                   select: str, header: str = "") -> str:
        """`header`, WITH the strategy's named constants, the CTEs (`fenced` ones kept
        apart by the profile's `stage_fence`, else stored by its `cte_materialized`), then
        `select`: joined once, since a statement can be megabytes and each copy of it
        costs time (fresh memory is slow to touch the first time)."""
        p = self.profile
        constants = [p.raw["constant_alias"].format(value=value, name=name)
                     for name, value in self.strategy.constants(ctx)]
        prefix, keyword = p.stage_fence(self.internal("fence")), p.raw.get("cte_materialized", "")
        inlined = self.strategy.inlined_stages(ctx)
        parts = [header, "WITH "]
        for item in constants:
            parts += [item, ",\n"]
        for name, body in ctes:
            mark = keyword if name in fenced and not prefix else \
                p.raw["cte_inlined"] if name in inlined else ""
            parts += [name, f" AS {mark + ' ' if mark else ''}(\n",
                      prefix if name in fenced else "", body, "\n),\n"]
        parts[-1] = "\n)\n"
        parts.append(select)
        return "".join(parts)

    def _context(self) -> Context:
        """Built once: its per-tree bounds are shared by the query and the setup statements."""
        if self._built is None:
            self._built = Context.build(self.forest, self.profile, self.internal("checked"),
                                        self.keys, self.internal("ok"), self.features,
                                        [name for _, name in self.identity])
        return self._built

    def _input_stages(self) -> list[tuple[str, str]]:
        return [(self.internal("input"), self._input_body()),
                (self.internal("checked"), self._guard_body())]

    @staticmethod
    def _select_list(items: list[str]) -> str:
        return ",\n  ".join(items)

    def _input_body(self) -> str:
        p = self.profile
        inputs = self.features[:self.forest.n_features]
        renderer = None if self.forest.inputs is None else \
            InputRenderer(self.forest.inputs, p, self.feature_columns)
        if renderer is None:
            values = [p.missing_as_null(p.cast_double(p.quote(col)))
                      for col in self.feature_columns]
        else:  # a pipeline: preprocessing computed from the raw columns
            values = renderer.features()
        stored = p.raw.get("input_value", "{x}")  # see dialects/README.md
        values = [stored.format(x=value) for value in values]
        if renderer is not None and (refused := renderer.refused()):
            values.append(f"CASE WHEN {refused} THEN 1 ELSE 0 END")
            inputs = [*inputs, self.internal("refused")]
        cast = [f"{value} AS {alias}" for value, alias in zip(values, inputs, strict=True)]
        self._checked_columns = [*self.keys, *inputs, self.internal("ok"),
                                 *self.features[self.forest.n_features:]]
        identity = [f"{expression} AS {name}" for expression, name in self.identity]
        select = (f"SELECT {self._select_list(identity + self.keys + cast)}\n"
                  f"FROM {p.qualified(self.request.table)}")
        if self.request.scored_in is None:
            return select
        source = self.internal("source")
        return (f"{select} {source}\nWHERE "
                f"{not_held(p, self.request.scored_in, self.request.keys, source)}")

    def _derived_columns(self) -> list[str]:
        """Category tests as numeric inputs: 0 (left set), 1 (right set), NULL otherwise."""
        double, columns = self.profile.double, []
        for i, test in enumerate(self.forest.derived):
            x = self.features[test.feature]
            branches = [f"WHEN {x} IN ({', '.join(map(double, values))}) THEN {double(side)}"
                        for side, values in ((0.0, test.left), (1.0, test.right)) if values]
            body = f"CASE {' '.join(branches)} END" if branches else f"CAST(NULL AS " \
                f"{self.profile.double_type})"
            columns.append(f"{body} AS {self.features[self.forest.n_features + i]}")
        return columns

    def _guard_body(self) -> str:
        """ok = 1 when the library would score the row, else 0 (its scores become NULL)."""
        inputs = self.features[:self.forest.n_features]
        refused = []
        if self.forest.refuses_float32_overflow:
            limit = self.profile.double(FLOAT32_OVERFLOW)
            refused += [f"ABS({f}) >= {limit}" for f in inputs]
        if not self.forest.accepts_missing:
            refused += [f"{f} IS NULL" for f in inputs]
        if self.forest.inputs is not None and self.forest.inputs.refusals:
            refused.append(f"{self.internal('refused')} = 1")  # the preprocessing refuses
        guard = f"CASE WHEN {' OR '.join(refused)} THEN 0 ELSE 1 END" if refused else "1"
        items = [f"{guard} AS {self.internal('ok')}", *self._derived_columns()]
        source = self.internal("input")
        return f"SELECT {source}.*, {', '.join(items)}\nFROM {source}"

    def _sums(self, ctx: Context, progress: Callable[[int], None] | None) -> list[list[str]]:
        """Per raw output, its initial value (summed models) then per-tree terms in tree order."""
        aggregation, double = self.forest.aggregation, self.profile.double
        leaf_values = self._leaf_value_functions()
        terms: list[list[str]] = [[] if aggregation.mean else [double(aggregation.initial[k])]
                                  for k in range(len(leaf_values))]
        owner = aggregation.tree_output
        for t in range(len(self.forest.trees)):
            for k, leaf_value in enumerate(leaf_values):
                if owner is None or owner[t] == k:
                    terms[k].append(self.strategy.tree_term(ctx, t, leaf_value(t)))
            if progress:
                progress(1)
        return terms

    def _partial_sum_stages(self, terms: list[list[str]], source: str, tag: str = "",
                            grouped: bool = False) -> list[tuple[str, str]]:
        """Sum left to right in tree order, the profile's `trees_per_stage` per CTE stage.

        One long `a + b + c ...` is as deep as it is long, and engines cap expression
        depth (DuckDB: 1000); a row engine also runs faster when each fenced stage's code
        stays small (SQLite, see its profile). Carrying a running sum from stage to stage
        keeps the exact left-to-right order of the library's accumulation. `grouped`: the
        strategy computes columns per group of trees (`group_columns`); see `_grouped_sums`.
        On return each `terms[k]` is replaced by [final sum expression].
        """
        stages: list[tuple[str, str]] = []
        n_trees, per_stage = len(terms[0]), self.profile.trees_per_stage
        if grouped and self.strategy.group_columns(self._context(), range(0)) is not None:
            return self._grouped_sums(terms, source)
        if n_trees <= per_stage:
            for column in terms:
                column[:] = [PLUS.join(column)]
            return stages
        running: list[str | None] = [None] * len(terms)
        for stage, start in enumerate(range(0, n_trees, per_stage)):
            items = self._running_sums(terms, running, range(start, start + per_stage),
                                       stage, tag)
            name = self.internal(f"{tag}sum{stage}")
            body = f"SELECT {source}.*,\n  {self._select_list(items)}\nFROM {source}"
            stages.append((name, body))
            source = name
        for k, column in enumerate(terms):
            column[:] = [running[k]]
        return stages

    def _running_sums(self, terms: list[list[str]], running: list[str | None], trees: range,
                      stage: int, tag: str = "") -> list[str]:
        """Select items adding `trees`' terms to each output's running sum (renamed)."""
        items = []
        for k, column in enumerate(terms):
            chunk = column[trees.start:trees.stop]
            if running[k] is not None:
                chunk = [running[k], *chunk]
            name = self.internal(f"{tag}s{stage}_{k}")
            items.append(f"{PLUS.join(chunk)} AS {name}")
            running[k] = name
        return items

    def _grouped_sums(self, terms: list[list[str]], source: str) -> list[tuple[str, str]]:
        """Stages that each compute one group's columns (the strategy's `group_columns`)
        and add the previous group's terms, which read those columns, to the running sums;
        a group's columns are dropped once summed. One stage more than groups; all fenced.
        Each stage keeps the checked input's columns, so the strategy has no stages of its
        own here."""
        ctx, per_stage = self._context(), self.profile.trees_per_stage
        n_trees = len(terms[0])
        starts = list(range(0, n_trees, per_stage))
        running: list[str | None] = [None] * len(terms)
        stages: list[tuple[str, str]] = []
        for stage in range(len(starts) + 1):
            items = list(self._checked_columns)
            if stage:  # the previous group's terms, over its columns in `source`
                done = range(starts[stage - 1], starts[stage - 1] + per_stage)
                items += self._running_sums(terms, running, done, stage - 1)
            if stage < len(starts):
                items += self.strategy.group_columns(
                    ctx, range(starts[stage], min(starts[stage] + per_stage, n_trees))) or []
            name = self.internal(f"sum{stage - 1}" if stage == len(starts) else f"group{stage}")
            stages.append((name, f"SELECT {self._select_list(items)}\nFROM {source}"))
            self._group_stages.add(name)
            source = name
        for k, column in enumerate(terms):
            column[:] = [running[k]]
        return stages

    def _leaf_value_functions(self) -> list[Callable[[int], LeafLiterals]]:
        """Per output column: tree index -> its leaf literals (a LeafValue)."""
        trees, profile = self.forest.trees, self.profile
        if self.request.combine is Combine.MAJORITY:
            if not self.forest.is_classifier or not self.forest.aggregation.mean:
                raise UserError("majority voting needs a classifier whose trees vote",
                                "drop --combine majority for this model")
            votes = [np.argmax(tree.value, axis=1) for tree in trees]
            return [lambda t, k=k: LeafLiterals((votes[t] == k).astype(np.float64), _votes,
                                                trees[t].is_leaf(), plain=True)
                    for k in range(self.forest.n_outputs)]
        column = (lambda k: 0) if self.forest.aggregation.tree_output else (lambda k: k)
        literals = LiteralTable(profile.doubles,
                                np.concatenate([tree.value[tree.is_leaf()] for tree in trees]))
        return [lambda t, k=k: LeafLiterals(trees[t].value[:, column(k)], literals,
                                            trees[t].is_leaf(), profile.plain_doubles)
                for k in range(self.forest.n_raw)]

    def _link_stages(self) -> list[tuple[str, str]]:
        """From raw scores `r<k>` (CTE raw) to outputs `p<k>` (CTE scores), raws kept.

        Same arithmetic as scikit-learn/scipy: sigmoid 1 / (1 + exp(-r)) with p0 = 1 - p1;
        softmax subtracts the row's largest raw score, exponentiates, divides by the sum
        taken left to right.
        """
        double, link = self.profile.double, self.forest.aggregation.link
        r = [self.internal(f"r{k}") for k in range(self.forest.n_raw)]
        p = [self.internal(f"p{k}") for k in range(self.forest.n_outputs)]
        lo, hi, one = double(-EXP_LIMIT), double(EXP_LIMIT), double(1.0)
        keep = self.keys + r
        if link is Link.ISOLATION:  # numpy: -(2 ** -(depths / divisor)) - offset_
            aggregation = self.forest.aggregation
            s = f"-POWER({double(2.0)}, -({r[0]} / {double(aggregation.divisor)}))"
            items = [f"{s} AS {p[0]}", f"({s}) - {double(aggregation.offset)} AS {p[1]}"]
            return [(self.internal("scores"),
                     f"SELECT {self._select_list(keep + items)}\nFROM {self.internal('raw')}")]
        if link in (Link.EXP, Link.SIGMOID):
            if link is Link.EXP:  # past EXP_LIMIT the value is too large to trust: NULL
                items = [f"CASE WHEN {r[0]} > {hi} THEN NULL ELSE EXP({r[0]}) END AS {p[0]}"]
            else:
                p1 = (f"CASE WHEN {r[0]} < {lo} THEN {double(0.0)} WHEN {r[0]} > {hi} "
                      f"THEN {one} ELSE {one} / ({one} + EXP(-{r[0]})) END")
                items = [f"{one} - ({p1}) AS {p[0]}", f"{p1} AS {p[1]}"]
            return [(self.internal("scores"),
                     f"SELECT {self._select_list(keep + items)}\nFROM {self.internal('raw')}")]
        top, e = self.internal("top"), [self.internal(f"e{k}") for k in range(len(r))]
        shifted = [f"{rk} - {top}" for rk in r]
        exps = [f"CASE WHEN {d} < {lo} THEN {double(0.0)} ELSE EXP({d}) END AS {ek}"
                for d, ek in zip(shifted, e, strict=True)]
        total = " + ".join(e)
        shares = [f"{ek} / ({total}) AS {pk}" for ek, pk in zip(e, p, strict=True)]
        raw = self.internal("raw")
        return [
            (self.internal("top"), f"SELECT {raw}.*, {self._first_max(r)} AS {top}\nFROM {raw}"),
            (self.internal("exp"), f"SELECT {self._select_list(keep + exps)}\n"
                                   f"FROM {self.internal('top')}"),
            (self.internal("scores"), f"SELECT {self._select_list(keep + shares)}\n"
                                      f"FROM {self.internal('exp')}"),
        ]

    @staticmethod
    def _first_max(columns: list[str]) -> str:
        """The largest of `columns` (NULL when they are NULL), without GREATEST/MAX(a, b)."""
        branches = [f"WHEN {' AND '.join(f'{c} >= {o}' for o in columns[k + 1:])} THEN {c}"
                    for k, c in enumerate(columns[:-1])]
        return f"CASE {' '.join(branches)} ELSE {columns[-1]} END"

    def _label(self) -> str:
        """The library's label: argmax of the probabilities (forests) or of the raw
        scores (boosting; one raw score decides a binary model by its sign)."""
        aggregation = self.forest.aggregation
        if aggregation.mean or aggregation.link is Link.IDENTITY:
            return self._argmax("p")
        if self.forest.n_raw > 1:
            return self._argmax("r")
        labels = [self.profile.label(c) for c in self.forest.classes]
        r0, zero = self.internal("r0"), self.profile.double(0.0)
        sign = ">=" if aggregation.positive_from_zero else ">"
        return (f"CASE WHEN {r0} IS NULL THEN NULL WHEN {r0} {sign} {zero} THEN {labels[1]} "
                f"ELSE {labels[0]} END")

    def _argmax(self, column: str, results: list[str] | None = None) -> str:
        """First class with the largest `<column>k`, NULL when the scores are NULL; gives
        that class's label, or its entry of `results` when given."""
        p = [self.internal(f"{column}{k}") for k in range(self.forest.n_outputs)]
        labels = results or [self.profile.label(c) for c in self.forest.classes]
        branches = [f"WHEN {p[0]} IS NULL THEN NULL"]
        for k in range(len(p) - 1):
            beats_rest = " AND ".join(f"{p[k]} >= {other}" for other in p[k + 1:])
            branches.append(f"WHEN {beats_rest} THEN {labels[k]}")
        return f"CASE {' '.join(branches)} ELSE {labels[-1]} END"
