"""The deployment manifest: a small table in the target database saying what is live.

Each deploy adds a numbered version per deployed name; exactly one version per name is
active. The manifest is written in the same transaction as the objects it describes, so
it never claims an object that does not exist, nor misses one that does.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.engines import Engine

MANIFEST_TABLE = "tree2sql_deployments"

# (column, kind): kind "int" or "text"; JSON lists and reports are stored as text.
COLUMNS: tuple[tuple[str, str], ...] = (
    ("name", "text"), ("version", "int"), ("active", "int"), ("form", "text"),
    ("fingerprint", "text"), ("tree2sql_version", "text"), ("dialect", "text"),
    ("strategy", "text"), ("combine", "text"), ("model", "text"), ("source", "text"),
    ("keys", "text"), ("source_columns", "text"), ("output_columns", "text"),
    ("statements", "text"), ("created_at", "text"), ("note", "text"),
    ("verification", "text"), ("verified_at", "text"),
    ("reference", "text"),  # monitoring reference; older manifests get it on the next deploy
)
JSON_COLUMNS = ("keys", "source_columns", "output_columns", "statements", "verification",
                "reference")


@dataclass
class Deployment:
    """One manifest row. `statements` are the ones that create the object (no drops)."""

    name: str
    version: int
    form: str
    fingerprint: str
    tree2sql_version: str
    dialect: str
    strategy: str
    combine: str
    model: str
    source: str
    keys: list[str]
    source_columns: list[str]
    output_columns: list[str]
    statements: list[str]
    created_at: str
    active: int = 1
    note: str = ""
    verification: dict[str, Any] | None = None
    verified_at: str | None = None
    reference: dict[str, Any] | None = None  # training reference for `tree2sql monitor`


def now() -> str:
    """UTC time, ISO 8601 to the second: sorts as text on every engine."""
    return datetime.now(UTC).isoformat(timespec="seconds")


def create_statement(profile: Profile) -> str:
    types = {"int": "INTEGER", "text": "TEXT"}
    columns = ",\n  ".join(
        f"{profile.quote(name)} {types[kind]}{' NOT NULL' if name in ('name', 'version') else ''}"
        for name, kind in COLUMNS)
    return (f"CREATE TABLE IF NOT EXISTS {profile.quote(MANIFEST_TABLE)} (\n  {columns},\n"
            f"  PRIMARY KEY ({profile.quote('name')}, {profile.quote('version')})\n)")


def exists(engine: Engine) -> bool:
    return engine.has_table(MANIFEST_TABLE)


def read(engine: Engine, profile: Profile, name: str | None = None) -> list[Deployment]:
    """Every version (of `name`, or of all names), ordered by name then version."""
    if not exists(engine):
        return []
    where = f" WHERE {profile.quote('name')} = {profile.string(name)}" if name else ""
    lacking = missing_columns(engine)
    present = [(c, kind) for c, kind in COLUMNS if c not in lacking]
    cols = ", ".join(profile.quote(c) for c, _ in present)
    found = engine.query(f"SELECT {cols} FROM {profile.quote(MANIFEST_TABLE)}{where}")
    rows = []
    for i in range(len(found["name"])):
        values = {c: _cell(found[c], i, kind) if (c, kind) in present else None
                  for c, kind in COLUMNS}
        for c in JSON_COLUMNS:
            values[c] = json.loads(values[c]) if values[c] else None
        rows.append(Deployment(**values))
    return sorted(rows, key=lambda d: (d.name, d.version))


def missing_columns(engine: Engine) -> list[str]:
    """Columns of COLUMNS that an existing manifest lacks (made by an older tree2sql)."""
    have = {c.name.lower() for c in engine.columns(MANIFEST_TABLE)}
    return [c for c, _ in COLUMNS if c.lower() not in have]


def upgrade_statements(engine: Engine, profile: Profile) -> list[str]:
    """ALTER TABLE ... ADD COLUMN for each missing (nullable, text) column, in the
    dialect's own syntax (sqlglot), run in the deploy's transaction."""
    import sqlglot

    return [sqlglot.transpile(f'ALTER TABLE "{MANIFEST_TABLE}" ADD COLUMN "{c}" TEXT',
                              read="postgres", write=profile.sqlglot_dialect)[0]
            for c in missing_columns(engine)]


def _cell(column: Any, i: int, kind: str) -> Any:
    value = column[i]
    if isinstance(column, np.ma.MaskedArray) and np.ma.getmaskarray(column)[i]:
        return None
    if value is None:
        return None
    return int(value) if kind == "int" else str(value)


def insert_statement(profile: Profile, d: Deployment) -> str:
    values = []
    for column, kind in COLUMNS:
        value = getattr(d, column)
        if column in JSON_COLUMNS and value is not None:
            value = json.dumps(value)
        values.append("NULL" if value is None else str(int(value)) if kind == "int"
                      else profile.string(value))
    cols = ", ".join(profile.quote(c) for c, _ in COLUMNS)
    return (f"INSERT INTO {profile.quote(MANIFEST_TABLE)} ({cols})\nVALUES ("
            + ", ".join(values) + ")")


def activate_statements(profile: Profile, name: str, version: int, note: str) -> list[str]:
    """Make `version` the only active version of `name`."""
    q, table = profile.quote, profile.quote(MANIFEST_TABLE)
    named = f"{q('name')} = {profile.string(name)}"
    return [f"UPDATE {table} SET {q('active')} = 0 WHERE {named} AND {q('active')} = 1",
            f"UPDATE {table} SET {q('active')} = 1, {q('note')} = {profile.string(note)} "
            f"WHERE {named} AND {q('version')} = {int(version)}"]


def note_statement(profile: Profile, name: str, version: int, note: str) -> str:
    q = profile.quote
    return (f"UPDATE {q(MANIFEST_TABLE)} SET {q('note')} = {profile.string(note)} "
            f"WHERE {q('name')} = {profile.string(name)} AND {q('version')} = {int(version)}")


def verification_statement(profile: Profile, name: str, version: int,
                           summary: dict[str, Any], at: str) -> str:
    q = profile.quote
    return (f"UPDATE {q(MANIFEST_TABLE)} SET {q('verification')} = "
            f"{profile.string(json.dumps(summary))}, {q('verified_at')} = {profile.string(at)} "
            f"WHERE {q('name')} = {profile.string(name)} AND {q('version')} = {int(version)}")


def active(deployments: list[Deployment], name: str) -> Deployment | None:
    return next((d for d in deployments if d.name == name and d.active), None)
