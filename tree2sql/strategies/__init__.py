"""SQL shapes for evaluating trees, and the planner that picks one per dialect."""

from __future__ import annotations

from tree2sql.dialects import Profile
from tree2sql.errors import UserError
from tree2sql.forest import Forest
from tree2sql.strategies.base import Context, Strategy
from tree2sql.strategies.nested_case import NestedCase
from tree2sql.strategies.node_arrays import NodeArrays

STRATEGIES: dict[str, type[Strategy]] = {cls.name: cls for cls in (NestedCase, NodeArrays)}

__all__ = ["STRATEGIES", "Context", "Strategy", "choose"]


def choose(forest: Forest, profile: Profile, forced: str | None = None) -> tuple[Strategy, str]:
    """The strategy to use and a sentence saying why."""
    if forced:
        if forced not in STRATEGIES:
            raise UserError(f"unknown strategy {forced!r}",
                            "use one of: " + ", ".join(sorted(STRATEGIES)))
        return STRATEGIES[forced](), f"{forced} (forced by --strategy)"
    for name in profile.strategies:
        cls = STRATEGIES.get(name)
        if cls is None:
            continue
        strategy = cls()
        limit = profile.limit("statement_bytes")
        size = strategy.statement_size_estimate(forest)
        if limit and size > limit:
            continue
        return strategy, f"{name}: first shape in the {profile.name} profile that fits its limits"
    raise UserError(f"no SQL shape fits {profile.name}'s limits for this model",
                    "force one with --strategy, or reduce the model's size")
