"""Load a data file (CSV, Parquet, or a table in a DuckDB file) into embedded DuckDB."""

from __future__ import annotations

from pathlib import Path

from tree2sql.engines import DuckDBEngine
from tree2sql.errors import UserError, existing_file

LOADED_TABLE = "t2s_rows"
ROW_KEY = "t2s_row"  # synthesized when the user names no key column

READERS = {".csv": "read_csv", ".tsv": "read_csv", ".parquet": "read_parquet",
           ".pq": "read_parquet"}
DUCKDB_SUFFIXES = (".duckdb", ".db", ".ddb")


def load_file(path: str | Path, table: str | None = None,
              add_row_key: bool = False) -> tuple[DuckDBEngine, str]:
    """An in-memory DuckDB holding the file's rows as one table; returns (engine, table)."""
    import duckdb

    path = existing_file(path, "data", "give a CSV or Parquet file, or a DuckDB file with --table",
                         "give a file with a header and rows")
    engine = DuckDBEngine()
    source = _source_expression(engine, path, table)
    row_key = f'row_number() OVER () AS "{ROW_KEY}", ' if add_row_key else ""
    try:
        engine.execute(f'CREATE TABLE "{LOADED_TABLE}" AS SELECT {row_key}* FROM {source}')
    except duckdb.Error as exc:
        raise UserError(f"cannot read {str(path)!r}: {exc}",
                        "check the file's format (CSV with a header row, or Parquet)") from exc
    # Checked before column types: a header-only CSV reads as all-text columns.
    if not engine.query(f'SELECT 1 AS "one" FROM "{LOADED_TABLE}" LIMIT 1')["one"].size:
        raise UserError(f"data file {str(path)!r} has no rows",
                        "give a file with a header and at least one row")
    return engine, LOADED_TABLE


def _source_expression(engine: DuckDBEngine, path: Path, table: str | None) -> str:
    from tree2sql.dialects import load_profile

    literal = load_profile("duckdb").string(str(path))
    suffix = path.suffix.lower()
    if suffix in DUCKDB_SUFFIXES:
        if not table:
            raise UserError(f"{str(path)!r} is a DuckDB database", "name the table with --table")
        engine.execute(f'ATTACH {literal} AS "t2s_src" (READ_ONLY)')
        return "t2s_src." + load_profile("duckdb").qualified(table)
    if table:
        raise UserError("--table applies only to DuckDB database files",
                        "drop --table for CSV and Parquet files")
    reader = READERS.get(suffix)
    if reader is None:
        raise UserError(f"cannot tell the format of {str(path)!r}",
                        "use a .csv, .parquet or .duckdb file")
    return f"{reader}({literal})"
