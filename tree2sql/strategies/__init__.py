"""SQL shapes for evaluating trees, and the planner that picks one per dialect.

The planner tries the shapes the profile lists, in its order, and takes the first whose
estimated demands fit every limit the profile states (see dialects/README.md). The
compiler adds a little of its own to each demand: one CASE around the final sum, and a
chain of up to the profile's `trees_per_stage` additions per sum stage.
"""

from __future__ import annotations

import math

from tree2sql.dialects import Profile
from tree2sql.errors import UserError
from tree2sql.forest import Forest
from tree2sql.strategies.base import Context, Needs, Strategy
from tree2sql.strategies.case_leaves import CaseLeaves
from tree2sql.strategies.declared_arrays import DeclaredArrays
from tree2sql.strategies.depth_staged import DepthStaged
from tree2sql.strategies.forest_levels import ForestLevels
from tree2sql.strategies.leaf_counts import LeafCounts
from tree2sql.strategies.level_arrays import LevelArrays
from tree2sql.strategies.model_table import ModelTable
from tree2sql.strategies.nested_case import NestedCase
from tree2sql.strategies.node_arrays import NodeArrays
from tree2sql.strategies.scan_groups import ScanGroups
from tree2sql.strategies.text_arrays import TextArrays

STRATEGIES: dict[str, type[Strategy]] = {
    cls.name: cls for cls in (NestedCase, NodeArrays, DepthStaged, ModelTable, TextArrays,
                              CaseLeaves, LevelArrays, LeafCounts, DeclaredArrays,
                              ScanGroups, ForestLevels)}
AST_ELEMENTS_PER_BYTE = 1 / 6  # rough parse-tree nodes per statement byte (estimate)
NO_ROW_IDENTITY = ("it joins on each row's physical identity, and the source is not known to "
                   "be a stored table (verify and deploy check it; a view has none)")

__all__ = ["STRATEGIES", "Context", "Needs", "Strategy", "choose", "limit_problem"]


def limit_problem(needs: Needs, forest: Forest, profile: Profile) -> str | None:
    """The first profile limit the shape would break, as a sentence; None when it fits."""
    if needs.unsuitable:
        return needs.unsuitable
    lim, per_stage = profile.limit, profile.trees_per_stage
    sum_stages = math.ceil(len(forest.trees) / per_stage)
    checks = [
        ("statement_bytes", needs.statement_bytes, "statement of about {need} bytes"),
        ("case_depth", needs.case_depth + 1, "CASE nested {need} levels deep"),
        ("expression_depth",
         needs.expression_depth + min(len(forest.trees), per_stage) + 4,
         "expression about {need} levels deep"),
        ("select_columns", needs.select_columns + forest.n_outputs * sum_stages,
         "select list of about {need} columns"),
        ("ast_elements", needs.ast_elements or int(needs.statement_bytes * AST_ELEMENTS_PER_BYTE),
         "about {need} parse-tree elements"),
        ("constant_elements", needs.constant_elements,
         "about {need} array elements parsed while planning"),
    ]
    for key, need, what in checks:
        limit = lim(key)
        if limit and need > limit:
            source = profile.limit_sources.get(key, "")
            return (f"{what.format(need=need)} > {profile.name}'s {key} limit {limit}"
                    + (f" ({source})" if source else ""))
    inline_nodes = profile.raw.get("inline_nodes")
    if needs.inline and inline_nodes and forest.n_nodes > inline_nodes:
        return (f"{forest.n_nodes} nodes written into the statement > {profile.name}'s "
                f"inline_nodes {inline_nodes}")
    return None


def choose(forest: Forest, profile: Profile, forced: str | None = None,
           persistent: bool = False, row_identity: bool = False) -> tuple[Strategy, str]:
    """The strategy to use and a sentence saying why. `persistent`: the SQL goes into a
    view or function, which cannot read a session-scoped shape's setup. `row_identity`:
    the source is checked to be a stored table (see Strategy.reads_row_identity)."""
    if forced:
        if forced not in STRATEGIES:
            raise UserError(f"unknown strategy {forced!r}",
                            "use one of: " + ", ".join(sorted(STRATEGIES)))
        if persistent and STRATEGIES[forced].session_scoped:
            raise UserError(f"{forced} keeps its arrays in session variables, which a view "
                            "or function cannot read", "deploy it --as table or incremental, "
                            "or choose another --strategy")
        strategy = STRATEGIES[forced]()
        problem = limit_problem(strategy.needs(forest, profile), forest, profile)
        if strategy.reads_row_identity and not row_identity:
            problem = ", ".join(filter(None, [problem, NO_ROW_IDENTITY]))
        warning = f"; beware: {problem}" if problem else ""
        return strategy, f"{forced} (forced by --strategy){warning}"
    passed_over = []
    for name in profile.strategies:
        cls = STRATEGIES.get(name)
        if cls is None:
            raise UserError(f"the {profile.name} profile lists an unknown strategy {name!r}",
                            "use one of: " + ", ".join(sorted(STRATEGIES)))
        if persistent and cls.session_scoped:
            passed_over.append(f"not {name}: a view or function cannot read its session "
                               "variables")
            continue
        if cls.reads_row_identity and not row_identity:
            passed_over.append(f"not {name}: {NO_ROW_IDENTITY}")
            continue
        strategy = cls()
        problem = limit_problem(strategy.needs(forest, profile), forest, profile)
        if problem is None:
            reason = f"{name}: first shape in the {profile.name} profile that fits its limits"
            if passed_over:
                reason += " (" + "; ".join(passed_over) + ")"
            return strategy, reason
        passed_over.append(f"not {name}: {problem}")
    raise UserError(f"no SQL shape fits {profile.name}'s limits for this model: "
                    + "; ".join(passed_over),
                    "force one with --strategy, or reduce the model's size")
