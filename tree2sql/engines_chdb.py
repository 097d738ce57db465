"""ClickHouse in-process through chdb: `chdb://` (in memory) or `chdb:///path/to/dir`.

Lets tests and users run the ClickHouse dialect's SQL on a real ClickHouse engine without
a server.
"""

from __future__ import annotations

import numpy as np

from tree2sql.engines import Column, Engine, _column_array, _is_numeric
from tree2sql.errors import UserError


class ChdbEngine(Engine):
    dialect = "clickhouse"

    def __init__(self, path: str | None = None) -> None:
        try:
            from chdb import session
        except ImportError as exc:
            raise UserError("chdb is not installed", "pip install chdb") from exc
        self.session = session.Session(path) if path else session.Session()

    def execute(self, sql: str) -> None:
        self.session.query(sql)

    def query(self, sql: str) -> dict[str, np.ndarray]:
        table = self.session.query(sql, "ArrowTable")
        return {name: _column_array(values) for name, values in table.to_pydict().items()}

    def columns(self, table: str) -> list[Column]:
        from tree2sql.dialects import load_profile

        name = load_profile("clickhouse").qualified(table)
        described = self.session.query(f"DESCRIBE TABLE {name}", "ArrowTable").to_pydict()
        return [Column(n, str(t).upper(), _is_numeric(str(t)))
                for n, t in zip(described["name"], described["type"], strict=True)]

    def close(self) -> None:
        self.session.close()
