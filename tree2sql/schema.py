"""Check a source table against what the model needs before any SQL runs."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

from tree2sql.compiler import ScoringRequest
from tree2sql.engines import Engine
from tree2sql.errors import UserError


def check_source(engine: Engine, table: str, features: Sequence[str],
                 keys: Sequence[str], text: Sequence[str] = ()) -> None:
    """Every feature and key column present by exact name; keys unique; features numeric,
    except the `text` ones, which feed string encoders and must hold text."""
    try:
        columns = {c.name: c for c in engine.columns(table)}
    except UserError:
        raise
    except Exception as exc:  # engines word a missing table differently
        raise UserError(f"cannot read table {table!r}: {exc}",
                        "check the table name (and schema)") from exc
    folded: dict[str, list[str]] = {}
    for name in columns:
        folded.setdefault(name.casefold(), []).append(name)
    for same in folded.values():
        if len(same) > 1 and any(n in features or n in keys for n in same):
            raise UserError(f"table {table!r} has columns that differ only in case: "
                            + ", ".join(map(repr, same)),
                            "rename one; engines disagree on which one a name means")
    problems = []
    for role, wanted in (("feature", features), ("key", keys)):
        for name in wanted:
            if name in columns:
                continue
            near = folded.get(name.casefold())
            hint = f" (the table has {near[0]!r})" if near else ""
            problems.append(f"{role} column {name!r} is missing{hint}")
    if problems:
        raise UserError(f"table {table!r} does not fit the model: " + "; ".join(problems),
                        "map model features to columns with --column FEATURE=COLUMN, "
                        "or name the key columns with --key")
    wrong = [f"{n!r} is {columns[n].type}" for n in features
             if n not in text and not columns[n].numeric]
    if wrong:
        raise UserError("feature columns must be numbers: " + ", ".join(wrong),
                        "cast or encode these columns to numbers in a view, and score the view")
    wrong = [f"{n!r} is {columns[n].type}" for n in text if columns[n].numeric]
    if wrong:
        raise UserError("columns that feed the pipeline's string categories must hold text: "
                        + ", ".join(wrong), "cast these columns to text in a view, and score "
                        "the view")
    _check_keys(engine, table, keys)


def _check_keys(engine: Engine, table: str, keys: Sequence[str]) -> None:
    """Rows are matched by key, so keys must be unique and never NULL."""
    from tree2sql.dialects import load_profile

    if not keys:
        raise UserError("no key column to match rows by", "name one with --key")
    p = load_profile(engine.dialect)
    cols = ", ".join(p.quote(k) for k in keys)
    source = p.qualified(table)
    nulls = " OR ".join(f"{p.quote(k)} IS NULL" for k in keys)
    found = engine.query(
        f"SELECT (SELECT COUNT(*) FROM {source} WHERE {nulls}) AS nulls, "
        f"(SELECT COUNT(*) FROM (SELECT {cols} FROM {source} GROUP BY {cols} "
        f"HAVING COUNT(*) > 1) {p.quote('d')}) AS dups")
    if int(found["nulls"][0]) or int(found["dups"][0]):
        raise UserError(f"key column(s) {', '.join(map(repr, keys))} must identify each row: "
                        f"{int(found['nulls'][0])} NULL keys, "
                        f"{int(found['dups'][0])} repeated keys",
                        "name key columns that are unique and never NULL (--key may repeat)")


def with_row_identity(engine: Engine, request: ScoringRequest) -> ScoringRequest:
    """`request`, marked `row_identity` when its table is a stored table with the
    dialect's physical row identity (profile `row_identity_check`), so that the planner
    may take shapes that join on it (tree2sql.strategies.scan_groups)."""
    from tree2sql.dialects import load_profile

    p = load_profile(engine.dialect)
    check = p.raw.get("row_identity_check")
    if not check:
        return request
    name = p.string(p.qualified(request.table))
    found = engine.query(check.format(name=name))
    return replace(request, row_identity=bool(len(next(iter(found.values()), []))))
