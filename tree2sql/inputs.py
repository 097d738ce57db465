"""The input plan: how each model input is computed from the table's raw columns.

A pipeline's preprocessing (imputers, scalers, encoders) becomes one small expression per
model input over the raw columns, in the library's own order of operations: impute, then
scale, then the tree compares. Like `tree2sql.forest` it holds no library objects and
writes no SQL; `tree2sql.input_sql` renders it through a dialect profile.

Missing values: a NULL in a numeric column reaches the library as NaN; in a text column as
None when the pipeline learned None as a category, otherwise as NaN (what pandas holds for a
gap in a string column). Values are floats (NaN = missing output) or category strings.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

Value = float | str  # a constant or a category as the library holds it


@dataclass(frozen=True)
class Raw:
    """Raw column `column` (an index into InputPlan.columns)."""

    column: int


@dataclass(frozen=True)
class Fill:
    """The argument, with missing values replaced by `value` (an imputer's statistic)."""

    arg: Expr
    value: Value


@dataclass(frozen=True)
class Arith:
    """One IEEE 754 double operation `arg op constant` (op: + - * /), as numpy applies it."""

    arg: Expr
    op: str
    constant: float


@dataclass(frozen=True)
class Clip:
    """numpy.clip: below `low` becomes `low`, above `high` becomes `high`, NaN stays NaN."""

    arg: Expr
    low: float
    high: float


@dataclass(frozen=True)
class Lookup:
    """An encoder output: each `cases` entry maps a set of known values to an output;
    a missing argument gives `missing`, any other value `unknown` (NaN = missing output)."""

    arg: Expr
    cases: tuple[tuple[tuple[Value, ...], float], ...]
    missing: float
    unknown: float


@dataclass(frozen=True)
class IsMissing:
    """1.0 when the argument is missing, else 0.0 (an imputer's missing indicator)."""

    arg: Expr


Expr = Raw | Fill | Arith | Clip | Lookup | IsMissing


@dataclass(frozen=True)
class NotFinite:
    """The library refuses a row whose `arg` is infinite (its check_array, allow-nan)."""

    arg: Expr


@dataclass(frozen=True)
class Unknown:
    """The library refuses a row whose `arg` is present but not one of `known` (an encoder
    with handle_unknown='error')."""

    arg: Expr
    known: tuple[Value, ...]


@dataclass(frozen=True)
class Gap:
    """The library refuses a row whose `arg` is missing (an encoder that never saw one)."""

    arg: Expr


Refusal = NotFinite | Unknown | Gap


@dataclass(frozen=True)
class InputPlan:
    """Raw columns as the pipeline was fit, and one expression per model input.

    `text[i]`: raw column i is read as text (it feeds an encoder of string categories) and
    is never cast to double. `null_as_none[i]`: a NULL in text column i reaches the library
    as None (else NaN). `named`: the pipeline was fit on a frame with column names (else on
    an array). `refusals`: conditions under which the library refuses the whole row.
    """

    columns: tuple[str, ...]
    text: tuple[bool, ...]
    null_as_none: tuple[bool, ...]
    features: tuple[Expr, ...]
    refusals: tuple[Refusal, ...] = ()
    named: bool = True


def raw_column(expr: Expr) -> int | None:
    """The raw column an expression reads through imputation only, else None."""
    while isinstance(expr, Fill):
        expr = expr.arg
    return expr.column if isinstance(expr, Raw) else None


def same_value(a: float, b: float) -> bool:
    """Equal outputs, NaN (missing) equal to NaN."""
    return a == b or (math.isnan(a) and math.isnan(b))
