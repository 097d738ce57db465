"""Dialect profiles: what the compiler must respect for each database.

Profiles are data (`dialects/NAME.toml`); quoting of identifiers and string literals goes
through sqlglot so that hostile names cannot change a statement.
"""

from __future__ import annotations

import functools
import tomllib
from dataclasses import dataclass, field
from typing import Any

from sqlglot import exp

from tree2sql.errors import UserError
from tree2sql.exact import float_text
from tree2sql.resources import data_dir


@dataclass(frozen=True)
class Profile:
    """One database's rendering rules and limits, as read from its TOML file."""

    name: str
    sqlglot_dialect: str
    double_type: str
    double_literal: str  # template over {text}: shortest round-trip text with exponent
    nan_to_null: str  # template over {x}: the expression with NaN turned into NULL
    boolean_literals: bool  # TRUE/FALSE exist as values (else 1/0)
    limits: dict[str, Any] = field(default_factory=dict)
    strategies: tuple[str, ...] = ("nested_case",)
    ddl: dict[str, str] = field(default_factory=dict)
    raw: dict[str, Any] = field(default_factory=dict, repr=False)

    def quote(self, name: str) -> str:
        """An identifier, always quoted, escaped for this dialect."""
        return exp.to_identifier(str(name), quoted=True).sql(dialect=self.sqlglot_dialect)

    def qualified(self, dotted: str) -> str:
        """A possibly schema-qualified table name, each part quoted (split on dots)."""
        return ".".join(self.quote(part) for part in dotted.split("."))

    def string(self, text: str) -> str:
        return exp.Literal.string(str(text)).sql(dialect=self.sqlglot_dialect)

    def double(self, value: float) -> str:
        return self.double_literal.format(text=float_text(value))

    def cast_double(self, sql: str) -> str:
        return f"CAST({sql} AS {self.double_type})"

    def missing_as_null(self, sql: str) -> str:
        return self.nan_to_null.format(x=sql)

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
    try:
        return Profile(
            name=name,
            sqlglot_dialect=raw.get("sqlglot_dialect", name),
            double_type=raw["double_type"],
            double_literal=raw.get("double_literal", "{text}"),
            nan_to_null=raw.get("nan_to_null", "{x}"),
            boolean_literals=raw.get("boolean_literals", True),
            limits=raw.get("limits", {}),
            strategies=tuple(raw.get("strategies", ["nested_case"])),
            ddl=raw.get("ddl", {}),
            raw=raw,
        )
    except KeyError as exc:
        raise UserError(f"dialect profile {path} lacks the key {exc}",
                        "add it; see dialects/README.md") from exc
