"""Shared test code: put numpy rows into a real embedded DuckDB table and verify a model on it.

Rows go in through Arrow, which keeps floating NaN and SQL NULL apart (a pandas frame
would turn NaN into NULL), so tests control exactly which kind of missing value they insert.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pyarrow as pa

from tree2sql.compiler import Combine, ScoringRequest, compile_forest
from tree2sql.dialects import load_profile
from tree2sql.engines import DuckDBEngine
from tree2sql.forest import Forest
from tree2sql.ingest import ingest
from tree2sql.verify import Report, verify

KEY = "row_id"
TABLE = "rows_to_score"
STRATEGIES = ("nested_case", "node_arrays", "leaf_counts")


def load_rows(engine: DuckDBEngine, X: np.ndarray, names: Sequence[str], *,
              table: str = TABLE, null_mask: np.ndarray | None = None,
              key: str = KEY) -> None:
    """CREATE TABLE `table` (key BIGINT, one DOUBLE per name) holding X; NULL where masked."""
    columns: dict[str, Any] = {key: pa.array(np.arange(len(X), dtype=np.int64))}
    for i, name in enumerate(names):
        mask = None if null_mask is None else np.asarray(null_mask[:, i], dtype=bool)
        columns[name] = pa.array(np.asarray(X[:, i], dtype=np.float64), mask=mask)
    rows = pa.table(columns)
    engine.con.register("__arrow_rows", rows)
    try:
        engine.execute(f"CREATE TABLE {load_profile('duckdb').quote(table)} AS "
                       "SELECT * FROM __arrow_rows")
    finally:
        engine.con.unregister("__arrow_rows")


def check(estimator: Any, X: np.ndarray, *, strategy: str,
          combine: Combine = Combine.AVERAGE, names: Sequence[str] | None = None,
          null_mask: np.ndarray | None = None, columns: dict[str, str] | None = None,
          forest: Forest | None = None) -> Report:
    """Load X into a fresh DuckDB, compile with `strategy`, verify against the estimator."""
    forest = forest or ingest(estimator)
    table_names = list(names) if names is not None else list(forest.feature_names)
    engine = DuckDBEngine()
    try:
        load_rows(engine, X, table_names, null_mask=null_mask)
        request = ScoringRequest(table=TABLE, keys=(KEY,), columns=columns or {},
                                 combine=combine, strategy=strategy)
        report = verify(estimator, forest, engine, request)
    finally:
        engine.close()
    assert report.strategy == strategy
    assert report.rows == len(X)
    return report


def compiled_sql(estimator: Any, *, strategy: str, dialect: str = "duckdb",
                 combine: Combine = Combine.AVERAGE) -> str:
    request = ScoringRequest(table=TABLE, keys=(KEY,), combine=combine, strategy=strategy)
    return compile_forest(ingest(estimator), request, dialect).sql


def assert_agrees(report: Report) -> None:
    assert report.disagreements == 0, report.to_text()
    assert report.max_abs_diff <= 1e-12, report.to_text()
