"""Spark SQL through pyspark: `spark://local[2]` (local mode) or a `spark://host:port` master.

One SparkSession per process (Spark's own rule: getOrCreate hands back the running one).
"""

from __future__ import annotations

import tempfile
from typing import Any

import numpy as np

from tree2sql.engines import Column, Engine, _column_array
from tree2sql.errors import UserError

LOCAL_SETTINGS = {
    "spark.ui.enabled": "false",  # no web UI for a scoring or test session
    "spark.ui.showConsoleProgress": "false",  # stderr is for tree2sql's own messages
    "spark.sql.shuffle.partitions": "4",  # small data in local mode: few shuffle tasks
    "spark.driver.memory": "2g",
}


def local_session(master: str = "local[2]") -> Any:
    """A SparkSession for this process, with a private warehouse folder."""
    try:
        from pyspark.sql import SparkSession
    except ImportError as exc:
        raise UserError("pyspark is not installed", "pip install pyspark (needs Java 17)") from exc
    builder = SparkSession.builder.master(master).appName("tree2sql")
    settings = {**LOCAL_SETTINGS,
                "spark.sql.warehouse.dir": tempfile.mkdtemp(prefix="tree2sql-spark-")}
    for key, value in settings.items():
        builder = builder.config(key, value)
    return builder.getOrCreate()


def has_session_variables(version: str) -> bool:
    """Spark 4.0 brought DECLARE VARIABLE (SPARK-42849), which declared_arrays uses."""
    return int(version.split(".")[0]) >= 4


class SparkEngine(Engine):
    dialect = "spark"

    def __init__(self, master: str = "local[2]", session: Any = None) -> None:
        self.spark = session if session is not None else local_session(master)

    def execute(self, sql: str) -> None:
        if sql.startswith("DECLARE") and not has_session_variables(self.spark.version):
            raise UserError(f"this session runs Spark {self.spark.version}, which has no "
                            "session variables (DECLARE VARIABLE needs Spark 4.0)",
                            "compile with --strategy text_arrays")
        self.spark.sql(sql)

    def query(self, sql: str) -> dict[str, np.ndarray]:
        frame = self.spark.sql(sql)
        rows = frame.collect()
        return {name: _column_array([row[i] for row in rows])
                for i, name in enumerate(frame.columns)}

    def columns(self, table: str) -> list[Column]:
        from pyspark.sql.types import NumericType

        from tree2sql.dialects import load_profile

        schema = self.spark.table(load_profile("spark").qualified(table)).schema
        return [Column(f.name, f.dataType.simpleString().upper(),
                       isinstance(f.dataType, NumericType)) for f in schema.fields]

    def close(self) -> None:
        """Leaves the session running: other engines in this process may share it."""
