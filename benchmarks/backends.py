"""One small adapter per engine, for the benchmark only: load rows, run, explain, round-trip.

Each adapter talks to its engine through the engine's own Python driver, so loading a
million rows and writing scores back is as fast as that driver allows (the yardstick
"export -> predict in Python -> import back" should not be handicapped by a slow path).
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numpy as np

TABLE = "bench_rows"
SCORED = "bench_scored"
ROUNDTRIP = "bench_roundtrip"


class Backend:
    dialect = ""

    def load(self, X: np.ndarray, names: list[str]) -> None:
        raise NotImplementedError

    def execute(self, sql: str) -> None:
        raise NotImplementedError

    def explain(self, sql: str) -> None:
        """Plan the statement without running it (parse, bind, optimize)."""
        self.execute(f"EXPLAIN {sql}")

    def create_as(self, sql: str) -> None:
        self.execute(f"CREATE TABLE {SCORED} AS {sql}")

    def drop(self, table: str) -> None:
        self.execute(f"DROP TABLE IF EXISTS {table}")

    def fetch_features(self, names: list[str]) -> np.ndarray:
        raise NotImplementedError

    def write_scores(self, ids: np.ndarray, scores: np.ndarray) -> None:
        raise NotImplementedError

    def close(self) -> None:
        pass

    def roundtrip(self, names: list[str], predict) -> None:
        """Export the rows, predict in Python, import the scores back as a table."""
        X = self.fetch_features(names)
        self.write_scores(np.arange(len(X)), predict(X))


def _columns(names: list[str], quote: str = '"') -> str:
    return ", ".join(f"{quote}{n}{quote}" for n in names)


class DuckDBBackend(Backend):
    dialect = "duckdb"

    def __init__(self) -> None:
        import duckdb

        self.con = duckdb.connect()

    def load(self, X, names):
        import pandas as pd

        frame = pd.DataFrame(X, columns=names)
        frame.insert(0, "id", np.arange(len(X), dtype=np.int64))
        self.con.register("bench_frame", frame)
        self.con.execute(f"CREATE TABLE {TABLE} AS SELECT * FROM bench_frame")
        self.con.unregister("bench_frame")

    def execute(self, sql):
        self.con.execute(sql)

    def fetch_features(self, names):
        got = self.con.execute(f"SELECT {_columns(names)} FROM {TABLE} ORDER BY id").fetchnumpy()
        return np.column_stack([np.ma.filled(got[n].astype(float), np.nan) for n in names])

    def write_scores(self, ids, scores):
        import pandas as pd

        frame = pd.DataFrame(scores, columns=[f"p{k}" for k in range(scores.shape[1])])
        frame.insert(0, "id", ids)
        self.con.register("bench_scores", frame)
        self.con.execute(f"CREATE TABLE {ROUNDTRIP} AS SELECT * FROM bench_scores")
        self.con.unregister("bench_scores")

    def close(self):
        self.con.close()


class SQLiteBackend(Backend):
    dialect = "sqlite"

    def __init__(self) -> None:
        import sqlite3

        self.dir = tempfile.TemporaryDirectory(prefix="t2s-bench-")
        self.con = sqlite3.connect(Path(self.dir.name) / "bench.sqlite", isolation_level=None)

    def load(self, X, names):
        cols = ", ".join(f'"{n}" REAL' for n in names)
        self.con.execute(f"CREATE TABLE {TABLE} (id INTEGER PRIMARY KEY, {cols})")
        marks = ", ".join("?" * (len(names) + 1))
        rows = ((i, *(None if v != v else v for v in row)) for i, row in enumerate(X.tolist()))
        self.con.execute("BEGIN")
        self.con.executemany(f"INSERT INTO {TABLE} VALUES ({marks})", rows)
        self.con.execute("COMMIT")

    def execute(self, sql):
        self.con.execute(sql).fetchall()

    def explain(self, sql):
        self.con.execute(f"EXPLAIN QUERY PLAN {sql}").fetchall()  # prepares the statement

    def fetch_features(self, names):
        rows = self.con.execute(f"SELECT {_columns(names)} FROM {TABLE} ORDER BY id").fetchall()
        return np.array(rows, dtype=float)  # None -> nan

    def write_scores(self, ids, scores):
        cols = ", ".join(f"p{k} REAL" for k in range(scores.shape[1]))
        self.con.execute(f"CREATE TABLE {ROUNDTRIP} (id INTEGER PRIMARY KEY, {cols})")
        marks = ", ".join("?" * (scores.shape[1] + 1))
        self.con.execute("BEGIN")
        self.con.executemany(f"INSERT INTO {ROUNDTRIP} VALUES ({marks})",
                             ((int(i), *row) for i, row in zip(ids, scores.tolist(), strict=True)))
        self.con.execute("COMMIT")

    def close(self):
        self.con.close()
        self.dir.cleanup()


class PostgresBackend(Backend):
    """A PostgreSQL server given by a SQLAlchemy-style URL (TREE2SQL_PG_URL); jit off."""

    dialect = "postgres"

    def __init__(self, url: str) -> None:
        import psycopg

        plain = url.replace("postgresql+psycopg://", "postgresql://")
        self.con = psycopg.connect(plain, autocommit=True)
        self.con.execute("SET jit = off")
        for table in (TABLE, SCORED, ROUNDTRIP):
            self.con.execute(f"DROP TABLE IF EXISTS {table}")

    def load(self, X, names):
        cols = ", ".join(f'"{n}" DOUBLE PRECISION' for n in names)
        self.con.execute(f"CREATE TABLE {TABLE} (id BIGINT PRIMARY KEY, {cols})")
        with self.con.cursor().copy(f"COPY {TABLE} FROM STDIN") as copy:
            for i, row in enumerate(X.tolist()):
                copy.write_row((i, *(None if v != v else v for v in row)))
        self.con.execute(f"ANALYZE {TABLE}")

    def execute(self, sql):
        self.con.execute(sql.replace("%", "%%") if "%" in sql else sql)

    def fetch_features(self, names):
        rows = self.con.execute(f"SELECT {_columns(names)} FROM {TABLE} ORDER BY id").fetchall()
        return np.array(rows, dtype=float)

    def write_scores(self, ids, scores):
        cols = ", ".join(f"p{k} DOUBLE PRECISION" for k in range(scores.shape[1]))
        self.con.execute(f"CREATE TABLE {ROUNDTRIP} (id BIGINT, {cols})")
        with self.con.cursor().copy(f"COPY {ROUNDTRIP} FROM STDIN") as copy:
            for i, row in zip(ids.tolist(), scores.tolist(), strict=True):
                copy.write_row((i, *row))

    def close(self):
        for table in (TABLE, SCORED, ROUNDTRIP):
            self.con.execute(f"DROP TABLE IF EXISTS {table}")
        self.con.close()


class ClickHouseBackend(Backend):
    """ClickHouse in process through chdb, with a session in a temporary directory."""

    dialect = "clickhouse"

    def __init__(self) -> None:
        from chdb import session

        self.dir = tempfile.TemporaryDirectory(prefix="t2s-bench-ch-")
        self.session = session.Session(self.dir.name)

    def load(self, X, names):
        import pandas as pd

        frame = pd.DataFrame(X, columns=names)
        frame.insert(0, "id", np.arange(len(X), dtype=np.int64))
        cols = ", ".join(f'"{n}" Nullable(Float64)' for n in names)
        self.execute(f"CREATE TABLE {TABLE} (id Int64, {cols}) ENGINE = MergeTree ORDER BY id")
        path = Path(self.dir.name) / "rows.parquet"
        frame.to_parquet(path)
        self.execute(f"INSERT INTO {TABLE} SELECT * FROM file('{path}', Parquet)")
        os.remove(path)

    def execute(self, sql):
        self.session.query(sql)

    def explain(self, sql):
        """Parse, analyze and plan, reading no rows. Not EXPLAIN: measured on chdb 4.4, its
        plan text with the node arrays as constants took minutes (longer than scoring)."""
        self.execute(f"SELECT * FROM (\n{sql}\n) LIMIT 0")

    def create_as(self, sql):
        self.execute(f"CREATE TABLE {SCORED} ENGINE = MergeTree ORDER BY tuple() AS {sql}")

    def fetch_features(self, names):
        table = self.session.query(f"SELECT {_columns(names)} FROM {TABLE} ORDER BY id",
                                   "ArrowTable")
        return np.column_stack([table.column(n).to_numpy(zero_copy_only=False).astype(float)
                                for n in names])

    def write_scores(self, ids, scores):
        import pandas as pd

        frame = pd.DataFrame(scores, columns=[f"p{k}" for k in range(scores.shape[1])])
        frame.insert(0, "id", ids)
        path = Path(self.dir.name) / "scores.parquet"
        frame.to_parquet(path)
        self.execute(f"CREATE TABLE {ROUNDTRIP} ENGINE = MergeTree ORDER BY tuple() AS "
                     f"SELECT * FROM file('{path}', Parquet)")

    def close(self):
        self.session.close()
        self.dir.cleanup()


class SparkBackend(Backend):
    """Spark SQL in local mode (`local[2]`, the machine's two cores), tables as parquet."""

    dialect = "spark"

    def __init__(self) -> None:
        from tree2sql.engines_spark import local_session

        self.dir = tempfile.TemporaryDirectory(prefix="t2s-bench-spark-")
        self.spark = local_session()
        self.spark.conf.set("spark.sql.execution.arrow.pyspark.enabled", "true")

    def load(self, X, names):
        import pandas as pd

        frame = pd.DataFrame(X, columns=names)
        frame.insert(0, "id", np.arange(len(X), dtype=np.int64))
        path = Path(self.dir.name) / "rows.parquet"
        frame.to_parquet(path)
        self.execute(f"DROP TABLE IF EXISTS {TABLE}")
        self.execute(f"CREATE TABLE {TABLE} USING parquet AS SELECT * FROM parquet.`{path}`")

    def execute(self, sql):
        self.spark.sql(sql).collect()

    def create_as(self, sql):
        self.execute(f"CREATE TABLE {SCORED} USING parquet AS {sql}")

    def fetch_features(self, names):
        frame = self.spark.sql(f"SELECT {_columns(names, '`')} FROM {TABLE} ORDER BY id"
                               ).toPandas()
        return frame.to_numpy(dtype=float)

    def write_scores(self, ids, scores):
        import pandas as pd

        frame = pd.DataFrame(scores, columns=[f"p{k}" for k in range(scores.shape[1])])
        frame.insert(0, "id", ids)
        self.execute(f"DROP TABLE IF EXISTS {ROUNDTRIP}")
        self.spark.createDataFrame(frame).write.format("parquet").saveAsTable(ROUNDTRIP)

    def close(self):
        for table in (TABLE, SCORED, ROUNDTRIP):
            self.execute(f"DROP TABLE IF EXISTS {table}")
        self.dir.cleanup()


def open_backend(engine: str, pg_url: str | None) -> Backend:
    if engine == "duckdb":
        return DuckDBBackend()
    if engine == "sqlite":
        return SQLiteBackend()
    if engine == "postgres":
        if not pg_url:
            raise RuntimeError("no PostgreSQL URL: pass --pg-url or set TREE2SQL_PG_URL")
        return PostgresBackend(pg_url)
    if engine == "clickhouse":
        return ClickHouseBackend()
    if engine == "spark":
        return SparkBackend()
    raise RuntimeError(f"no benchmark backend for {engine!r}")
