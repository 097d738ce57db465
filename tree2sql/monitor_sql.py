"""The monitoring statement: drift and outcome figures of a table, computed in the database.

One SELECT returns one row per figure, columns (kind, subject, part, value,
missing_share, below_range_share, above_range_share):

- kind 'table': rows counted (subject 'rows' for the feature rows, 'scored_rows').
- kind 'feature' / 'score': one row per monitored quantity; value is its population
  stability index against the training reference, then its share of missing values and
  of values below / above the training range (shares of all rows).
- kind 'outcome' (with a label column), subject the figure: labelled_rows,
  unknown_labels (a label that is no class of the model), accuracy, log_loss, roc_auc
  (part: '' for the model's figure, a class for its one-vs-rest AUC); a regressor gets
  mae and rmse instead. Kind 'confusion': subject the true class, part the predicted
  class, value the rows (classes in the model's order).

PSI = sum over bins of (a - e) * ln(a / e), a and e today's and the training share of a
bin, both raised to PSI_FLOOR when smaller so that an empty bin gives a large but finite
term (common practice; the floor is a convention, not a standard). Bins follow
tree2sql.monitor (missing values are a bin of their own).

Log loss clips each row's probability of its true class to [eps, 1 - eps], eps the
float64 machine epsilon, and does not renormalise: scikit-learn 1.9's
sklearn.metrics.log_loss (sklearn/metrics/_classification.py, `_log_loss`).
ROC AUC is the rank-sum (Mann-Whitney U) statistic, ties given their average rank:
(sum of positives' ranks - P(P+1)/2) / (P N). A binary model's positive class is its
second class; a multiclass model gets one-vs-rest AUC per class (subject: the class)
and their unweighted mean (subject ''), as roc_auc_score(multi_class='ovr',
average='macro'). Figures use the rows with a known label and a score.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

from sqlglot import exp

from tree2sql import __version__
from tree2sql.compiler import (
    Combine,
    ScoringRequest,
    compile_forest,
    feature_columns,
    score_column_names,
    text_columns,
)
from tree2sql.dialects import Profile, load_profile
from tree2sql.errors import UserError
from tree2sql.forest import Forest, Task
from tree2sql.monitor import Binned, MonitorReference

PSI_FLOOR = 1e-4  # share given to an empty bin (common practice)
EPS = 2.220446049250313e-16  # numpy.finfo(numpy.float64).eps, IEEE 754 binary64
OUTPUT_COLUMNS = ("kind", "subject", "part", "value", "missing_share", "below_range_share",
                  "above_range_share")
# Engines that refuse a WITH clause inside a subquery, so the model's own statement cannot
# be nested (SQL Server: "Common table expressions" in Transact-SQL reference, from memory).
NO_NESTED_WITH = frozenset({"tsql"})
PREFIX = "__t2s_m_"  # the monitor's own intermediate names
# A SELECT of constants needs a FROM on some engines (Oracle before 23ai: the one-row
# DUAL table; Oracle SQL Language Reference, "Selecting from the DUAL Table", from memory).
FROM_ONE_ROW = {"oracle": " FROM DUAL"}


@dataclass(frozen=True)
class MonitorRequest:
    """Where the rows, scores and outcomes are.

    `scores` None: the model's SQL is compiled into the statement over `table`.
    `scores` == `table`: the table holds the score columns itself. Otherwise `scores` is
    a relation with the score columns (e.g. a deployed table), joined to `table` on `keys`.
    """

    table: str
    columns: dict[str, str] = field(default_factory=dict)
    prefix: str = "score_"
    scores: str | None = None
    keys: tuple[str, ...] = ()
    label: str | None = None
    combine: Combine = Combine.AVERAGE
    strategy: str | None = None


@dataclass(frozen=True)
class MonitorQuery:
    sql: str
    setup: tuple[str, ...]  # statements the model's SQL needs first (compute mode)
    dialect: str

    @property
    def script(self) -> str:
        return "".join(f"{s};\n\n" for s in self.setup) + self.sql


class _Sql:
    """Small rendering helpers bound to one profile."""

    def __init__(self, profile: Profile) -> None:
        self.p = profile
        self.one, self.zero = profile.double(1.0), profile.double(0.0)

    def name(self, text: str) -> str:
        return self.p.quote(PREFIX + text)

    def d(self, sql: str) -> str:
        return self.p.cast_double(sql)

    def count(self, condition: str) -> str:
        """Rows meeting `condition`, summed as doubles: exact to 2^53 and no integer
        overflow on engines whose COUNT is 32-bit."""
        return f"SUM(CASE WHEN {condition} THEN {self.one} ELSE {self.zero} END)"

    def total(self, condition: str, value: str) -> str:
        return f"SUM(CASE WHEN {condition} THEN {value} ELSE {self.zero} END)"

    def rows(self) -> str:
        return f"COALESCE(SUM({self.one}), {self.zero})"

    def ratio(self, top: str, bottom: str) -> str:
        return f"({top}) / NULLIF({bottom}, {self.zero})"

    def ln(self, sql: str) -> str:
        placeholder = PREFIX + "arg"
        text = exp.Ln(this=exp.column(placeholder)).sql(dialect=self.p.sqlglot_dialect)
        return text.replace(placeholder, f"({sql})")

    def floor(self, sql: str) -> str:
        floor = self.p.double(PSI_FLOOR)
        return f"CASE WHEN {sql} < {floor} THEN {floor} ELSE {sql} END"


def bin_conditions(x: str, edges: list[float], p: Profile) -> list[str]:
    """SQL conditions for bins 1 .. len(edges)+1 (tree2sql.monitor's rule)."""
    lits = [p.double(e) for e in edges]
    if not lits:
        return [f"{x} IS NOT NULL"]
    conds = [f"{x} <= {lits[0]}"]
    conds += [f"{x} > {lo} AND {x} <= {hi}" for lo, hi in zip(lits, lits[1:], strict=False)]
    return conds + [f"{x} > {lits[-1]}"]


@dataclass
class _Figure:
    """One output row: its labels and up to four value expressions over the count row."""

    kind: str
    subject: str
    part: str
    values: list[str]


def render_monitor(forest: Forest, reference: MonitorReference, request: MonitorRequest,
                   dialect: str | Profile = "duckdb") -> MonitorQuery:
    """The monitoring statement for `dialect` (see the module docstring for its rows).

    Each costly stage (the rows, the model's scores) is read once: the counts land in two
    one-row stages, and the figures are unfolded from them by a join with a small numbers
    relation, so engines that inline common table expressions scan the table once per
    side rather than once per figure.
    """
    p = dialect if isinstance(dialect, Profile) else load_profile(dialect)
    reference.check_model(forest)
    s = _Sql(p)
    if request.label is not None and forest.task is Task.ANOMALY:
        raise UserError("outcome metrics need a classifier or a regressor; this model "
                        "scores anomalies", "drop --label")
    if request.scores not in (None, request.table) and not request.keys:
        raise UserError("scores read from another table are matched to the rows by key",
                        "name the key columns with --key")
    features = feature_columns(forest, request.columns)
    text = set(text_columns(forest, request.columns))
    by_name = {ref.name: ref for ref in reference.items if ref.kind == "feature"}
    absent = [n for n in forest.input_names if n not in by_name]
    if absent:
        raise UserError("the monitoring reference lacks the features "
                        + ", ".join(map(repr, absent)),
                        "capture the reference again for this model")
    inputs = [f"{_feature_value(p, c, c in text)} AS {s.name(f'x{i}')}"
              for i, c in enumerate(features)]
    scored, setup = _scored_source(forest, request, p, s)
    labelled = request.label is not None
    ranked = labelled and forest.is_classifier
    ctes = [(s.name("in"), f"SELECT {', '.join(inputs)}\nFROM {p.qualified(request.table)}"),
            (s.name("sc"), scored)]
    if ranked:
        ctes.append((s.name("rk"), _ranked(forest, s)))
    feature_counts, figures = [], [_Figure("table", "rows", "", [s.name("n_in")]),
                                   _Figure("table", "scored_rows", "", [s.name("n_sc")])]
    for i, name in enumerate(forest.input_names):
        feature_counts += _item_counts(by_name[name], s.name(f"x{i}"), f"i{i}", s)
        figures.append(_item_figure(by_name[name], f"i{i}", s, s.name("n_in")))
    score_counts = []
    for j, ref in enumerate(r for r in reference.items if r.kind == "score"):
        score_counts += _item_counts(ref, s.name(f"p{ref.output}"), f"s{j}", s)
        figures.append(_item_figure(ref, f"s{j}", s, s.name("n_sc")))
    if labelled:
        score_counts += _outcome_sums(forest, s)
        figures += _outcome_figures(forest, s)
    _check_width(p, len(feature_counts), len(score_counts))
    ctes.append((s.name("c_in"), _aggregate(s, "n_in", feature_counts, "in")))
    ctes.append((s.name("c_sc"), _aggregate(s, "n_sc", score_counts,
                                            "rk" if ranked else "sc")))
    ctes += _numbers(p, s, len(figures))
    header = (f"-- tree2sql {__version__} monitoring: {_comment(forest.source)}\n"
              f"-- model fingerprint sha256:{forest.fingerprint()}; training reference of "
              f"{reference.rows} rows captured {_comment(reference.created_at)}\n"
              f"-- PSI floor {PSI_FLOOR:g}; bins: {_comment(reference.bins)}\n")
    sql = f"{header}WITH {_with(ctes)}\n{_unfold(figures, s)}"
    return MonitorQuery(sql=sql, setup=setup, dialect=p.name)


def _comment(text: str) -> str:
    """Text for a -- comment: a line break would end the comment and let text run as SQL."""
    return " ".join(str(text).replace("\x00", " ").split())


def _with(ctes: list[tuple[str, str]]) -> str:
    return ",\n".join(f"{name} AS (\n{body}\n)" for name, body in ctes)


def _check_width(p: Profile, *widths: int) -> None:
    limit = p.limit("select_columns")
    if limit is not None and max(widths) + 1 > int(limit):
        raise UserError(f"monitoring this model needs {max(widths) + 1} columns in one "
                        f"SELECT, beyond {p.name}'s limit of {limit}",
                        "monitor it on an engine with a higher column limit")


def _aggregate(s: _Sql, n: str, columns: list[str], source: str) -> str:
    body = ",\n  ".join([f"{s.rows()} AS {s.name(n)}", *columns])
    return f"SELECT {body}\nFROM {s.name(source)}"


def _feature_value(p: Profile, column: str, text: bool) -> str:
    return p.quote(column) if text else p.missing_as_null(p.cast_double(p.quote(column)))


def _scored_source(forest: Forest, request: MonitorRequest, p: Profile,
                   s: _Sql) -> tuple[str, tuple[str, ...]]:
    """The body of the scored-rows stage: probabilities/value, predicted and true class."""
    names, label_col = score_column_names(forest, request.prefix)
    setup: tuple[str, ...] = ()
    score_ref = label_ref = lambda c: p.quote(c)  # noqa: E731
    if request.scores is None:
        if p.name in NO_NESTED_WITH:
            raise UserError(f"{p.name} cannot nest the model's statement inside the "
                            "monitoring statement",
                            "deploy the model as a view or table and name it with --scores")
        keys = (request.label,) if request.label is not None else ()
        compiled = compile_forest(forest, ScoringRequest(
            table=request.table, keys=keys, columns=request.columns, prefix=request.prefix,
            combine=request.combine, strategy=request.strategy), p)
        source = f"(\n{compiled.sql}\n) {s.name('model')}"
        setup = compiled.setup
    elif request.scores == request.table or request.label is None:
        source = p.qualified(request.scores)
    else:
        sa, ta = s.name("s"), s.name("t")
        match = " AND ".join(f"{sa}.{p.quote(k)} = {ta}.{p.quote(k)}" for k in request.keys)
        source = (f"{p.qualified(request.scores)} {sa}\nJOIN {p.qualified(request.table)} {ta} "
                  f"ON {match}")
        score_ref = lambda c: f"{sa}.{p.quote(c)}"  # noqa: E731
        label_ref = lambda c: f"{ta}.{p.quote(c)}"  # noqa: E731
    cols = [f"{p.missing_as_null(p.cast_double(score_ref(n)))} AS {s.name(f'p{k}')}"
            for k, n in enumerate(names)]
    if request.label is not None:
        y = label_ref(request.label)
        cols.append(f"CASE WHEN {y} IS NULL THEN 0 ELSE 1 END AS {s.name('has_y')}")
        if forest.is_classifier:
            cols.append(f"{_class_index(p, y, forest.classes)} AS {s.name('y')}")
            cols.append(f"{_class_index(p, score_ref(label_col), forest.classes)} "
                        f"AS {s.name('yhat')}")
        else:
            cols.append(f"{p.missing_as_null(p.cast_double(y))} AS {s.name('y')}")
    return f"SELECT {', '.join(cols)}\nFROM {source}", setup


def _class_index(p: Profile, sql: str, classes: tuple) -> str:
    """The class's position in the model's order; NULL for a value that is no class."""
    whens = " ".join(f"WHEN {sql} = {p.label(c)} THEN {k}" for k, c in enumerate(classes))
    return f"CASE {whens} END"


def _item_counts(ref: Binned, x: str, tag: str, s: _Sql) -> list[str]:
    columns = [f"{s.count(f'{x} IS NULL')} AS {s.name(f'{tag}_m')}"]
    if ref.text:
        return columns
    columns += [f"{s.count(c)} AS {s.name(f'{tag}_b{j}')}"
                for j, c in enumerate(bin_conditions(x, ref.edges, s.p), start=1)]
    if ref.min is not None:
        columns += [f"{s.count(f'{x} < {s.p.double(ref.min)}')} AS {s.name(f'{tag}_lo')}",
                    f"{s.count(f'{x} > {s.p.double(ref.max)}')} AS {s.name(f'{tag}_hi')}"]
    return columns


def _item_figure(ref: Binned, tag: str, s: _Sql, n: str) -> _Figure:
    share: Callable[[str], str] = lambda part: s.ratio(s.name(f"{tag}_{part}"), n)  # noqa: E731
    none = "NULL"
    psi = none
    if not ref.text:
        expected = [ref.missing_share, *ref.shares]
        parts = ["m", *(f"b{j}" for j in range(1, len(ref.shares) + 1))]
        terms = []
        for part, e in zip(parts, expected, strict=True):
            a, e_sql = s.floor(share(part)), s.p.double(max(e, PSI_FLOOR))
            terms.append(f"(({a}) - {e_sql}) * {s.ln(f'({a}) / {e_sql}')}")
        psi = "\n    + ".join(terms)
    ranged = ref.min is not None and not ref.text
    return _Figure(ref.kind, ref.name, "", [psi, share("m"), share("lo") if ranged else none,
                                            share("hi") if ranged else none])


def _usable(forest: Forest, s: _Sql) -> str:
    scores = [f"{s.name(f'p{k}')} IS NOT NULL" for k in range(len(forest.classes or [0]))]
    return " AND ".join([f"{s.name('y')} IS NOT NULL", *scores])


def _auc_classes(forest: Forest) -> list[int]:
    return [1] if len(forest.classes) == 2 else list(range(len(forest.classes)))


def _ranked(forest: Forest, s: _Sql) -> str:
    """Scored rows, flagged usable (label known, scored), with each usable row's average
    rank per AUC class among the usable rows: (#below + 1 + #below + ties) / 2, written
    with ascending and descending RANK() so no engine has to partition on a double."""
    usable = s.name("u")
    ranks = []
    for k in _auc_classes(forest):
        prob = s.name(f"p{k}")
        window = f"PARTITION BY {usable}"
        up = s.d(f"RANK() OVER ({window} ORDER BY {prob})")
        down = s.d(f"RANK() OVER ({window} ORDER BY {prob} DESC)")
        everyone = s.d(f"COUNT(*) OVER ({window})")
        ranks.append(f"({up} + {everyone} + {s.one} - {down}) / {s.p.double(2.0)} "
                     f"AS {s.name(f'r{k}')}")
    flagged = (f"SELECT {s.name('sc')}.*, CASE WHEN {_usable(forest, s)} THEN 1 ELSE 0 END "
               f"AS {usable}\nFROM {s.name('sc')}")
    return (f"SELECT {s.name('f')}.*, {', '.join(ranks)}\nFROM (\n{flagged}\n) {s.name('f')}")


def _outcome_sums(forest: Forest, s: _Sql) -> list[str]:
    y = s.name("y")
    known = f"{s.name('has_y')} = 1 AND {y} IS NULL"
    if not forest.is_classifier:
        v = s.name("p0")
        ok = f"{y} IS NOT NULL AND {v} IS NOT NULL"
        return [f"{s.count(known)} AS {s.name('unknown')}",
                f"{s.count(ok)} AS {s.name('m')}",
                f"{s.total(ok, f'ABS({y} - {v})')} AS {s.name('sae')}",
                f"{s.total(ok, f'({y} - {v}) * ({y} - {v})')} AS {s.name('sse')}"]
    ok, yhat = f"{s.name('u')} = 1", s.name("yhat")
    k_all = range(len(forest.classes))
    probs = [s.name(f"p{k}") for k in k_all]
    true_p = "CASE " + " ".join(f"WHEN {y} = {k} THEN {probs[k]}" for k in k_all) + " END"
    eps, top = s.p.double(EPS), s.p.double(1.0 - EPS)
    clipped = (f"CASE WHEN {true_p} < {eps} THEN {eps} WHEN {true_p} > {top} THEN {top} "
               f"ELSE {true_p} END")
    sums = [f"{s.count(known)} AS {s.name('unknown')}",
            f"{s.count(ok)} AS {s.name('m')}",
            f"{s.count(f'{ok} AND {y} = {yhat}')} AS {s.name('hit')}",
            f"{s.total(ok, f'-{s.ln(clipped)}')} AS {s.name('nll')}"]
    sums += [f"{s.count(f'{ok} AND {y} = {i} AND {yhat} = {j}')} AS {s.name(f'cm{i}_{j}')}"
             for i in k_all for j in k_all]
    for k in _auc_classes(forest):
        sums += [f"{s.count(f'{ok} AND {y} = {k}')} AS {s.name(f'pos{k}')}",
                 f"{s.total(f'{ok} AND {y} = {k}', s.name(f'r{k}'))} AS {s.name(f'rs{k}')}"]
    return sums


def _outcome_figures(forest: Forest, s: _Sql) -> list[_Figure]:
    m = s.name("m")
    rows = [_Figure("outcome", "labelled_rows", "", [m]),
            _Figure("outcome", "unknown_labels", "", [s.name("unknown")])]
    if not forest.is_classifier:
        return rows + [_Figure("outcome", "mae", "", [s.ratio(s.name("sae"), m)]),
                       _Figure("outcome", "rmse", "",
                               [f"SQRT({s.ratio(s.name('sse'), m)})"])]
    labels = [str(c) for c in forest.classes]
    rows += [_Figure("outcome", "accuracy", "", [s.ratio(s.name("hit"), m)]),
             _Figure("outcome", "log_loss", "", [s.ratio(s.name("nll"), m)])]
    aucs = {}
    for k in _auc_classes(forest):
        pos, rs = s.name(f"pos{k}"), s.name(f"rs{k}")
        aucs[k] = s.ratio(f"{rs} - {pos} * ({pos} + {s.one}) / {s.p.double(2.0)}",
                          f"{pos} * ({m} - {pos})")
    if len(aucs) == 1:
        rows.append(_Figure("outcome", "roc_auc", "", [aucs[1]]))
    else:
        mean = f"({' + '.join(f'({a})' for a in aucs.values())}) / {s.p.double(len(aucs))}"
        rows.append(_Figure("outcome", "roc_auc", "", [mean]))
        rows += [_Figure("outcome", "roc_auc", labels[k], [a]) for k, a in aucs.items()]
    rows += [_Figure("confusion", labels[i], labels[j], [s.name(f"cm{i}_{j}")])
             for i in range(len(labels)) for j in range(len(labels))]
    return rows


def _numbers(p: Profile, s: _Sql, count: int) -> list[tuple[str, str]]:
    """A relation of the numbers 0 .. count-1 from a ten-row digits relation."""
    suffix = FROM_ONE_ROW.get(p.name, "")
    digits = "\nUNION ALL\n".join(f"SELECT {d} AS {s.name('d')}{suffix}" for d in range(10))
    places = max(1, len(str(count - 1)))
    aliases = [s.name(f"d{i}") for i in range(places)]
    value = " + ".join(f"{10 ** i} * {a}.{s.name('d')}" for i, a in enumerate(aliases))
    joined = " CROSS JOIN ".join(f"{s.name('digits')} {a}" for a in aliases)
    return [(s.name("digits"), digits),
            (s.name("numbers"), f"SELECT {value} AS {s.name('i')}\nFROM {joined}")]


def _unfold(figures: list[_Figure], s: _Sql) -> str:
    """One output row per figure: CASE on the row number picks its labels and values."""
    p, i = s.p, s.name("i")

    def pick(cells: list[str]) -> str:
        return "CASE " + "\n    ".join(f"WHEN {i} = {n} THEN {c}"
                                       for n, c in enumerate(cells)) + " END"

    columns = [pick([p.string(f.kind) for f in figures]),
               pick([p.string(f.subject) for f in figures]),
               pick([p.string(f.part) for f in figures])]
    for v in range(4):
        cells = [(f.values + ["NULL"] * 4)[v] for f in figures]
        columns.append(s.d(pick([s.d(c) for c in cells])))
    listed = ",\n  ".join(f"{c} AS {p.quote(n)}" for c, n in zip(columns, OUTPUT_COLUMNS,
                                                                   strict=True))
    return (f"SELECT {listed}\nFROM {s.name('c_in')} CROSS JOIN {s.name('c_sc')} "
            f"CROSS JOIN {s.name('numbers')}\nWHERE {i} < {len(figures)}\nORDER BY {i}")
