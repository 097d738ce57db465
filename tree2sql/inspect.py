"""What a model looks like before it is compiled, and what each SQL shape would cost.

For the DBA who reviews a deployment: the forest's size and shape, the features it
splits on, and, per dialect profile and strategy, the statement size, the CASE nesting,
the engine limits it would cross and the planner's choice. Everything here is computed
from the neutral `Forest`; `tree2sql.inspect_plot` draws it, `tree2sql.cli_inspect`
prints it.
"""

from __future__ import annotations

import dataclasses
import json
import statistics
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.dialects import Profile, available, load_profile
from tree2sql.errors import UserError
from tree2sql.forest import Forest, Link
from tree2sql.sql_measure import measure_statement
from tree2sql.strategies import STRATEGIES, Needs, Strategy, choose, limit_problem

# Compile for real only below this many node outputs (nodes x outputs per node): compiling
# runs at roughly 25k node outputs per second here (12k-node, 10-class digits forest,
# nested CASE: 0.5 s), and inspect compiles once per dialect and strategy.
MEASURE_LIMIT = 20_000
PROBE_TABLE = "scored_rows"  # table name in the statements compiled for measuring

# Profile limit key (dialects/README.md) -> the figure of a shape it bounds. Keys missing
# here are reported as unchecked rather than silently passed.
LIMIT_MEASURES = {
    "statement_bytes": "largest_statement_bytes",
    "case_depth": "case_depth",
    "expression_depth": "expression_depth",
    "select_columns": "select_items",
    "case_arguments": "case_arguments",
}


@dataclass(frozen=True)
class Spread:
    min: float
    median: float
    max: float

    @classmethod
    def of(cls, values: Sequence[int]) -> Spread:
        return cls(min(values), statistics.median(values), max(values))


@dataclass(frozen=True)
class FeatureUse:
    index: int
    name: str
    splits: int  # split nodes testing the feature, over all trees
    trees: int  # trees with at least one such split


@dataclass(frozen=True)
class LimitCheck:
    limit: str  # key in the profile's [limits]
    allowed: int | float
    measure: str | None  # which figure it bounds; None when inspect does not know the key
    observed: int | None  # None when not known for this shape
    crossed: bool


@dataclass(frozen=True)
class ShapeReport:
    """One strategy rendered for one dialect."""

    dialect: str
    strategy: str
    listed: bool  # the profile names this strategy among those the planner may choose
    renders: bool | None  # None: not tried (model too large and its deepest tree too)
    error: str | None
    statement_bytes: int | None  # the SELECT
    size_from: str  # "compiled" or "estimate"
    setup_statements: int | None  # statements to run first (a model table), when compiled
    setup_bytes: int | None  # the largest of those
    case_depth: int | None
    expression_depth: int | None
    select_items: int | None
    case_arguments: int | None
    figures_from: str | None  # "compiled", "deepest tree" (per-tree figures only) or None
    planner_estimate: str | None = None  # the planner's objection from its estimates, if any
    limits: list[LimitCheck] = field(default_factory=list)

    @property
    def largest_statement_bytes(self) -> int | None:
        if self.statement_bytes is None:
            return None
        return max(self.statement_bytes, self.setup_bytes or 0)

    @property
    def crosses(self) -> list[str]:
        return [c.limit for c in self.limits if c.crossed]


@dataclass(frozen=True)
class PlannerChoice:
    dialect: str
    strategy: str | None  # None when no shape fits
    reason: str


@dataclass
class Inspection:
    source: str
    task: str
    classes: list[Any] | None
    n_trees: int
    n_nodes: int
    n_leaves: int
    tree_depths: list[int]
    tree_leaves: list[int]
    tree_nodes: list[int]
    depth: Spread
    leaves: Spread
    nodes: Spread
    features: list[FeatureUse]  # every model feature, in model order
    accepts_missing: bool
    comparison: str
    aggregation: str
    fingerprint: str
    shapes: list[ShapeReport]
    planner: list[PlannerChoice]
    measure_limit: int | None  # node outputs up to which shapes were compiled for real

    @property
    def unused_features(self) -> list[str]:
        return [f.name for f in self.features if f.splits == 0]

    def to_dict(self) -> dict[str, Any]:
        data = asdict(self)
        data["unused_features"] = self.unused_features
        for shape, row in zip(self.shapes, data["shapes"], strict=True):
            row["crosses"] = shape.crosses
        return data

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2, default=_json_default)

    def to_text(self) -> str:
        from tree2sql.inspect_text import render_text

        return render_text(self)


def inspect_forest(forest: Forest, dialects: Sequence[str] | None = None,
                   measure_limit: int | None = MEASURE_LIMIT) -> Inspection:
    """The full report. `measure_limit=None` compiles every shape whatever the size."""
    depths = forest.tree_depths()
    leaves = [int(tree.is_leaf().sum()) for tree in forest.trees]
    nodes = [tree.n_nodes for tree in forest.trees]
    profiles = [load_profile(name) for name in (dialects or available())]
    return Inspection(
        source=forest.source,
        task=forest.task.value,
        classes=list(forest.classes) if forest.classes is not None else None,
        n_trees=len(forest.trees),
        n_nodes=forest.n_nodes,
        n_leaves=sum(leaves),
        tree_depths=depths,
        tree_leaves=leaves,
        tree_nodes=nodes,
        depth=Spread.of(depths),
        leaves=Spread.of(leaves),
        nodes=Spread.of(nodes),
        features=feature_use(forest),
        accepts_missing=forest.accepts_missing,
        comparison=forest.comparison.value,
        aggregation=describe_aggregation(forest),
        fingerprint=forest.fingerprint(),
        shapes=[shape for profile in profiles
                for shape in shape_reports(forest, profile, depths, measure_limit)],
        planner=[planner_choice(forest, profile) for profile in profiles],
        measure_limit=measure_limit,
    )


def describe_aggregation(forest: Forest) -> str:
    rule = forest.aggregation
    if rule.mean:
        combined = "mean of the trees' values"
    else:
        combined = "initial score + sum of the trees' values"
    return combined + ("" if rule.link is Link.IDENTITY else f", then {rule.link.value}")


def feature_use(forest: Forest) -> list[FeatureUse]:
    """Split counts per feature over all trees, in the model's feature order.

    A split on a derived category test counts for the feature it reads.
    """
    reads = np.arange(forest.n_features + len(forest.derived))
    for i, test in enumerate(forest.derived):
        reads[forest.n_features + i] = test.feature
    splits = np.zeros(forest.n_features, dtype=np.int64)
    trees = np.zeros(forest.n_features, dtype=np.int64)
    for tree in forest.trees:
        counts = np.bincount(reads[tree.feature[~tree.is_leaf()]],
                             minlength=forest.n_features)
        splits += counts
        trees += counts > 0
    return [FeatureUse(i, name, int(splits[i]), int(trees[i]))
            for i, name in enumerate(forest.feature_names)]


def shape_reports(forest: Forest, profile: Profile, depths: list[int],
                  measure_limit: int | None) -> list[ShapeReport]:
    """Every registered strategy for one dialect, compiled when the model is small enough."""
    small = measure_limit is None or _work(forest) <= measure_limit
    sample = None if small else _deepest_trees(forest, depths)
    if sample is not None and _work(sample) > MEASURE_LIMIT:
        sample = None  # even one tree per output is too large to compile quickly
    reports = []
    for name, cls in STRATEGIES.items():
        listed = name in profile.strategies
        needs, objection = _planner_view(forest, profile, cls())
        if small:
            report = _compiled_shape(forest, profile, name, listed)
        else:
            report = _estimated_shape(forest, profile, name, listed, needs, sample)
        reports.append(dataclasses.replace(report, planner_estimate=objection,
                                           limits=check_limits(report, profile)))
    return reports


def _planner_view(forest: Forest, profile: Profile,
                  strategy: Strategy) -> tuple[Needs | None, str | None]:
    """The strategy's own estimates and the planner's objection to them, if any."""
    try:
        needs = strategy.needs(forest, profile)
    except Exception as exc:  # a shape this dialect cannot express
        return None, _describe(exc)
    return needs, limit_problem(needs, forest, profile)


def _describe(exc: Exception) -> str:
    return exc.problem if isinstance(exc, UserError) else f"{type(exc).__name__}: {exc}"


def _work(forest: Forest) -> int:
    return forest.n_nodes * max(1, forest.n_outputs)


def _deepest_trees(forest: Forest, depths: list[int]) -> Forest:
    """The forest cut down to its deepest tree per output sum.

    CASE nesting and CASE width are per tree in every shape, so this small forest shows
    them for the whole model; depths and widths that grow with the number of trees do not.
    """
    owner = forest.aggregation.tree_output
    groups = [list(range(len(forest.trees)))] if owner is None else \
        [forest.trees_feeding(k) for k in range(forest.n_raw)]
    picked = [max(group, key=lambda t: depths[t]) for group in groups if group]
    aggregation = forest.aggregation if owner is None else \
        dataclasses.replace(forest.aggregation, tree_output=tuple(owner[t] for t in picked))
    return dataclasses.replace(forest, trees=tuple(forest.trees[t] for t in picked),
                               aggregation=aggregation, _fingerprint=[])


def _compiled_shape(forest: Forest, profile: Profile, strategy: str,
                    listed: bool) -> ShapeReport:
    try:
        compiled = compile_forest(
            forest, ScoringRequest(table=PROBE_TABLE, strategy=strategy), profile.name)
    except Exception as exc:  # a shape this dialect cannot express: report, do not stop
        return ShapeReport(profile.name, strategy, listed, renders=False, error=_describe(exc),
                           statement_bytes=None, size_from="compiled", setup_statements=None,
                           setup_bytes=None, case_depth=None, expression_depth=None,
                           select_items=None, case_arguments=None, figures_from=None)
    figures = measure_statement(compiled.sql, profile)
    setup = [len(statement.encode()) for statement in compiled.setup]
    return ShapeReport(profile.name, strategy, listed, renders=True, error=None,
                       statement_bytes=len(compiled.sql.encode()), size_from="compiled",
                       setup_statements=len(setup), setup_bytes=max(setup, default=None),
                       case_depth=figures.case_depth,
                       expression_depth=figures.expression_depth,
                       select_items=figures.select_items,
                       case_arguments=figures.case_arguments, figures_from="compiled")


def _estimated_shape(forest: Forest, profile: Profile, name: str, listed: bool,
                     needs: Needs | None, sample: Forest | None) -> ShapeReport:
    """Size from the planner's estimate; per-tree figures from the deepest trees alone."""
    measured = _compiled_shape(sample, profile, name, listed) if sample is not None else None
    return ShapeReport(
        profile.name, name, listed,
        renders=measured.renders if measured else None,
        error=measured.error if measured else None,
        statement_bytes=needs.statement_bytes if needs else None, size_from="estimate",
        setup_statements=None, setup_bytes=None,
        case_depth=measured.case_depth if measured else None,
        expression_depth=None, select_items=None,
        case_arguments=measured.case_arguments if measured else None,
        figures_from="deepest tree" if measured and measured.renders else None)


def check_limits(shape: ShapeReport, profile: Profile) -> list[LimitCheck]:
    """Each of the profile's limits against the figure of this shape it bounds."""
    checks = []
    for key, allowed in sorted(profile.limits.items()):
        measure = LIMIT_MEASURES.get(key)
        observed = getattr(shape, measure) if measure else None
        crossed = observed is not None and observed > allowed
        checks.append(LimitCheck(key, allowed, measure, observed, crossed))
    return checks


def planner_choice(forest: Forest, profile: Profile) -> PlannerChoice:
    """What `compile` would pick for this dialect; a planner failure is reported, not raised,
    so one unfinished profile does not hide the others."""
    try:
        strategy, reason = choose(forest, profile)
    except UserError as exc:
        return PlannerChoice(profile.name, None, f"{exc.problem}; {exc.fix}")
    except Exception as exc:
        return PlannerChoice(profile.name, None, _describe(exc))
    return PlannerChoice(profile.name, strategy.name, reason)


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    return str(value)
