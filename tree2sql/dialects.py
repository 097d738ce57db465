"""Dialect profiles: what the compiler must respect for each database.

Profiles are data (`dialects/NAME.toml`); quoting of identifiers and string literals goes
through sqlglot so that hostile names cannot change a statement.
"""

from __future__ import annotations

import functools
import math
import re
import tomllib
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from sqlglot import exp
from sqlglot.dialects.dialect import Dialect

from tree2sql.errors import UserError
from tree2sql.exact import SHORTEST, float_texts
from tree2sql.resources import data_dir

# Default trees summed per CTE stage: long `a + b + c ...` chains are as deep as they are
# long, and engines cap expression depth (DuckDB: 1000).
TREES_PER_STAGE = 100


@dataclass(frozen=True)
class Profile:
    """One database's rendering rules and limits, as read from its TOML file."""

    name: str
    sqlglot_dialect: str
    double_type: str
    double_literal: str  # template over {text}: shortest round-trip text with exponent
    nan_to_null: str  # template over {x}: the expression with NaN turned into NULL
    boolean_literals: bool  # TRUE/FALSE exist as values (else 1/0)
    integer_type: str = "INTEGER"
    row_number: str = "ROW_NUMBER() OVER ()"  # a per-row id within one statement
    nan_literal: str | None = None  # SQL for a NaN double; None when the engine has none
    infinity_literal: str | None = None  # SQL for +infinity; None when the engine has none
    limits: dict[str, Any] = field(default_factory=dict)
    limit_sources: dict[str, str] = field(default_factory=dict)  # limit key -> where from
    strategies: tuple[str, ...] = ("nested_case",)
    ddl: dict[str, str] = field(default_factory=dict)
    raw: dict[str, Any] = field(default_factory=dict, repr=False)

    def quote(self, name: str) -> str:
        """An identifier, always quoted, escaped for this dialect (cached: sqlglot's
        generator costs far more than the lookup, and names repeat per tree)."""
        return _quote(self.sqlglot_dialect, str(name))

    def qualified(self, dotted: str) -> str:
        """A possibly schema-qualified table name, each part quoted (split on dots)."""
        return ".".join(self.quote(part) for part in dotted.split("."))

    def string(self, text: str) -> str:
        """A string literal. Text of characters no dialect escapes (a node array's numbers)
        is spliced into the dialect's quotes, skipping sqlglot for megabyte literals."""
        text = str(text)
        if _PLAIN_TEXT.fullmatch(text):
            before, after = _string_quotes(self.sqlglot_dialect)
            return before + text + after
        return _string(self.sqlglot_dialect, text)

    def double(self, value: float) -> str:
        """A double literal; `literal_style` in the profile picks how (see tree2sql.exact)."""
        return _double(float(value), self.raw.get("literal_style", SHORTEST),
                       self.raw.get("arithmetic_literal", "{text}"), self.double_literal)

    @property
    def plain_doubles(self) -> bool:
        """Literals are the shortest round-trip number text itself (no template, no
        arithmetic), so they read back with float() and can be written in bulk."""
        return (self.double_literal == "{text}"
                and self.raw.get("literal_style", SHORTEST) == SHORTEST)

    def doubles(self, values: np.ndarray, suffix: str = "") -> list[str]:
        """`double` of each value, in bulk (tree2sql.exact.float_texts), each followed by
        `suffix` at no extra cost (a shape's next fixed text, one string fewer to join)."""
        return float_texts(values, self.raw.get("literal_style", SHORTEST),
                           self.raw.get("arithmetic_literal", "{text}"),
                           self.double_literal + suffix)

    @property
    def trees_per_stage(self) -> int:
        """Trees summed per CTE stage (profile key `trees_per_stage`; see the compiler's
        `_partial_sum_stages`)."""
        return int(self.raw.get("trees_per_stage", TREES_PER_STAGE))

    def stage_fence(self, name: str) -> str:
        """What goes before a stage's SELECT so the engine plans the stage apart instead
        of flattening it into the query that reads it, over the quoted `name` of a CTE it
        never reads (profile key `stage_fence`; "" where the profile has none)."""
        fence = self.raw.get("stage_fence", "")
        return fence.format(name=name) + "\n" if fence else ""

    @property
    def fences_stages(self) -> bool:
        """A stage can be kept from being flattened into what reads it: by `stage_fence`
        before its SELECT, or by the keyword `cte_materialized` that stores it."""
        return bool(self.raw.get("stage_fence") or self.raw.get("cte_materialized"))

    @property
    def session_settings(self) -> tuple[str, ...]:
        """Statements to run in the session before scoring (profile key `session_settings`,
        e.g. PostgreSQL's `SET jit = off`): compile prints them, verify and deploy run them."""
        return tuple(self.raw.get("session_settings", ()))

    @property
    def array_double_type(self) -> str:
        """Element type of constant arrays of doubles, which never hold NULL (profile key
        `array_double_type`; default `double_type`)."""
        return self.raw.get("array_double_type", self.double_type)

    def indicator(self, condition: str) -> str:
        """1 where `condition` holds, else 0 (profile key `indicator` over {condition})."""
        return self.raw.get("indicator", "CASE WHEN {condition} THEN 1 ELSE 0 END").format(
            condition=condition)

    def cast_double(self, sql: str) -> str:
        return f"CAST({sql} AS {self.double_type})"

    def missing_as_null(self, sql: str) -> str:
        return self.nan_to_null.format(x=sql)

    def guarded(self, ok: str, value: str) -> str:
        """`value` where the guard column `ok` is 1, else NULL (profile key `guarded`)."""
        return self.raw.get("guarded", "CASE WHEN {ok} = 1 THEN {value} END").format(
            ok=ok, value=value)

    def label(self, value: Any) -> str:
        """A class label as a SQL literal of its own type."""
        if isinstance(value, bool):
            if self.boolean_literals:
                return "TRUE" if value else "FALSE"
            return "1" if value else "0"
        if isinstance(value, int):
            return str(value)
        if isinstance(value, float):
            return self.double(value)
        return self.string(value)

    def limit(self, key: str, default: Any = None) -> Any:
        return self.limits.get(key, default)

    def render_ddl(self, kind: str, **parts: str) -> str:
        """A DDL statement from the profile's `[ddl]` template `kind` (view, table, ...)."""
        template = self.ddl.get(kind)
        if template is None:
            raise UserError(f"the {self.name} profile has no {kind!r} statement form",
                            f"add `{kind}` under [ddl] in dialects/{self.name}.toml")
        return template.format(**parts)


# Characters sqlglot never escapes inside a string literal, in any dialect.
_PLAIN_TEXT = re.compile(r"[0-9A-Za-z.,+\-\[\] ]*")
_QUOTE_PROBE = "0x0"


@functools.lru_cache(maxsize=1 << 16)
def _quote(dialect: str, name: str) -> str:
    return exp.to_identifier(_no_nul(name), quoted=True).sql(dialect=dialect)


def _string(dialect: str, text: str) -> str:
    return exp.Literal.string(_no_nul(text)).sql(dialect=dialect)


@functools.cache
def _string_quotes(dialect: str) -> tuple[str, str]:
    """What the dialect writes before and after a plain string literal's text."""
    before, _, after = _string(dialect, _QUOTE_PROBE).partition(_QUOTE_PROBE)
    return before, after


def _double(value: float, style: str, arithmetic: str, template: str) -> str:
    """`Profile.double`, remembered: leaf values repeat across trees (0, 1, small
    fractions), and some literal styles cost microseconds each. Zeros are remembered by
    their sign, which a cache keyed by value would not tell apart (-0.0 == 0.0)."""
    if value == 0.0:
        return _remembered_zero(math.copysign(1.0, value) < 0, style, arithmetic, template)
    return _remembered_double_text(value, style, arithmetic, template)


def _double_text(value: float, style: str, arithmetic: str, template: str) -> str:
    return float_texts(np.array([value]), style, arithmetic, template)[0]


_remembered_double_text = functools.lru_cache(maxsize=1 << 16)(_double_text)


@functools.lru_cache(maxsize=16)
def _remembered_zero(negative: bool, style: str, arithmetic: str, template: str) -> str:
    return _double_text(-0.0 if negative else 0.0, style, arithmetic, template)


def _no_nul(text: str) -> str:
    """NUL cannot travel in SQL text: SQLite's driver refuses it and PostgreSQL's protocol
    ends the statement there, cutting a quoted name open."""
    if "\x00" in text:
        raise UserError(f"the name or label {text!r} contains a NUL character, which SQL "
                        "statements cannot carry",
                        "rename the feature, class label or column without NUL characters")
    return text


def available() -> list[str]:
    return sorted(p.stem for p in data_dir("dialects").glob("*.toml"))


@functools.cache
def load_profile(name: str) -> Profile:
    path = data_dir("dialects") / f"{name}.toml"
    if not path.is_file():
        raise UserError(f"unknown dialect {name!r}",
                        "use one of sqlglot's dialect names: " + ", ".join(available()))
    with path.open("rb") as handle:
        raw = tomllib.load(handle)
    # sqlglot imports a dialect's module on first use (tens of milliseconds): do it here,
    # with the rest of loading the dialect, not in the middle of the first compile.
    Dialect.get_or_raise(raw.get("sqlglot_dialect", name))
    try:
        return Profile(
            name=name,
            sqlglot_dialect=raw.get("sqlglot_dialect", name),
            double_type=raw["double_type"],
            double_literal=raw.get("double_literal", "{text}"),
            nan_to_null=raw.get("nan_to_null", "{x}"),
            boolean_literals=raw.get("boolean_literals", True),
            integer_type=raw.get("integer_type", "INTEGER"),
            row_number=raw.get("row_number", "ROW_NUMBER() OVER ()"),
            nan_literal=raw.get("nan_literal"),
            infinity_literal=raw.get("infinity_literal"),
            limits=raw.get("limits", {}),
            limit_sources=raw.get("limit_sources", {}),
            strategies=tuple(raw.get("strategies", ["nested_case"])),
            ddl=raw.get("ddl", {}),
            raw=raw,
        )
    except KeyError as exc:
        raise UserError(f"dialect profile {path} lacks the key {exc}",
                        "add it; see dialects/README.md") from exc
