"""Render an input plan as SQL over the raw columns, through a dialect profile.

Arithmetic is written one IEEE operation at a time in the library's order ((x - mean) /
scale, x * scale + min, ...), so the engine's doubles equal numpy's; nothing is folded
into thresholds. Category strings go through Profile.string, numbers through
Profile.double, so hostile categories cannot change the statement.
"""

from __future__ import annotations

import math
import sys

from tree2sql.dialects import Profile
from tree2sql.inputs import (
    Arith,
    Clip,
    Expr,
    Fill,
    Gap,
    InputPlan,
    IsMissing,
    Lookup,
    NotFinite,
    Raw,
    Refusal,
    Unknown,
    Value,
    same_value,
)

DOUBLE_MAX = sys.float_info.max  # |x| above it is infinite


class InputRenderer:
    """SQL for one plan: `columns[i]` is the table column read for plan column i."""

    def __init__(self, plan: InputPlan, profile: Profile, columns: list[str]) -> None:
        self.plan, self.profile = plan, profile
        p = profile
        self.raw = [p.quote(c) if text else p.missing_as_null(p.cast_double(p.quote(c)))
                    for c, text in zip(columns, plan.text, strict=True)]

    def features(self) -> list[str]:
        """One double expression per model input, NULL for missing."""
        return [self.expr(e) for e in self.plan.features]

    def refused(self) -> str | None:
        """A condition true when the library refuses the row (None: it refuses none)."""
        parts = [self.refusal(r) for r in self.plan.refusals]
        return " OR ".join(parts) if parts else None

    def literal(self, value: Value) -> str:
        if isinstance(value, str):
            return self.profile.string(value)
        if math.isnan(value):
            return f"CAST(NULL AS {self.profile.double_type})"
        return self.profile.double(value)

    def expr(self, e: Expr) -> str:
        if isinstance(e, Raw):
            return self.raw[e.column]
        if isinstance(e, Fill):
            return f"COALESCE({self.expr(e.arg)}, {self.literal(e.value)})"
        if isinstance(e, Arith):
            return f"({self.expr(e.arg)} {e.op} {self.literal(e.constant)})"
        if isinstance(e, Clip):
            x, low, high = self.expr(e.arg), self.literal(e.low), self.literal(e.high)
            return f"CASE WHEN {x} < {low} THEN {low} WHEN {x} > {high} THEN {high} ELSE {x} END"
        if isinstance(e, IsMissing):
            one, zero = self.literal(1.0), self.literal(0.0)
            return f"CASE WHEN {self.expr(e.arg)} IS NULL THEN {one} ELSE {zero} END"
        if isinstance(e, Lookup):
            return self._lookup(e)
        raise TypeError(f"unknown input expression {e!r}")

    def _lookup(self, e: Lookup) -> str:
        x = self.expr(e.arg)
        branches = []
        if not same_value(e.missing, e.unknown):  # else NULL falls through to ELSE anyway
            branches.append(f"WHEN {x} IS NULL THEN {self.literal(e.missing)}")
        branches += [f"WHEN {x} IN ({self._values(values)}) THEN {self.literal(output)}"
                     for values, output in e.cases if values]
        if not branches:
            return self.literal(e.unknown)
        return f"CASE {' '.join(branches)} ELSE {self.literal(e.unknown)} END"

    def _values(self, values: tuple[Value, ...]) -> str:
        return ", ".join(self.literal(v) for v in values)

    def refusal(self, r: Refusal) -> str:
        x = self.expr(r.arg)
        if isinstance(r, NotFinite):
            return f"ABS({x}) > {self.literal(DOUBLE_MAX)}"
        if isinstance(r, Unknown):
            if not r.known:
                return f"{x} IS NOT NULL"
            return f"({x} IS NOT NULL AND {x} NOT IN ({self._values(r.known)}))"
        if isinstance(r, Gap):
            return f"{x} IS NULL"
        raise TypeError(f"unknown refusal {r!r}")
