"""Deploy in place on real engines: a DuckDB file, a SQLite file and PostgreSQL on loopback.

Reference data: the iris data set (Fisher 1936, UCI Machine Learning Repository), as bundled
with scikit-learn. The reference predictions are scikit-learn's own predict_proba/predict.
Deployed objects are read back with each engine's own driver (duckdb, sqlite3, psycopg via
SQLAlchemy), not through tree2sql, and catalogs are listed from the engines' own catalogs.
"""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import skops.io
from click.testing import CliRunner
from sklearn.datasets import load_iris
from sklearn.ensemble import RandomForestClassifier

from tree2sql.cli import cli
from tree2sql.dialects import load_profile

IRIS = load_iris(as_frame=True)  # Fisher 1936, UCI ML repository
FEATURES = list(IRIS.data.columns)  # "sepal length (cm)", ...: spaces and brackets
OUTPUTS = ["score_prob_0", "score_prob_1", "score_prob_2", "score_class"]
TOLERANCE = 1e-12  # DESIGN.md, exactness rule 4


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


@dataclass
class Target:
    """One real database, reached through its own driver for set-up and checks."""

    kind: str
    url: str
    path: Path | None = None
    sa_engine: Any = None
    schema: str | None = None

    def run(self, sql: str, params: list[tuple] | None = None) -> list[tuple]:
        if self.kind == "duckdb":
            import duckdb

            con = duckdb.connect(str(self.path))
            try:
                if params:
                    con.executemany(sql, params)
                    return []
                return con.execute(sql).fetchall()
            finally:
                con.close()
        if self.kind == "sqlite":
            con = sqlite3.connect(str(self.path))
            try:
                rows = con.executemany(sql, params).fetchall() if params else \
                    con.execute(sql).fetchall()
                con.commit()
                return rows
            finally:
                con.close()
        with self.sa_engine.begin() as conn:
            raw = conn.connection.cursor()
            raw.execute(f"SET LOCAL search_path TO {_quote(self.schema)}")
            if params:
                raw.executemany(sql.replace("?", "%s"), params)
                return []
            raw.execute(sql)
            return raw.fetchall() if raw.description else []

    def catalog(self) -> list[tuple]:
        """Every object in the database/schema, and the manifest's rows when it exists."""
        if self.kind == "duckdb":
            objects = self.run(
                "SELECT 'relation', table_name, table_type FROM information_schema.tables "
                "UNION ALL SELECT 'function', function_name, function_type "
                "FROM duckdb_functions() WHERE NOT internal "
                "UNION ALL SELECT 'index', index_name, table_name FROM duckdb_indexes()")
        elif self.kind == "sqlite":
            objects = self.run("SELECT type, name, tbl_name FROM sqlite_master")
        else:
            s = self.schema.replace("'", "''")
            objects = self.run(
                "SELECT 'relation', c.relname, c.relkind::text FROM pg_class c JOIN "
                f"pg_namespace n ON n.oid = c.relnamespace WHERE n.nspname = '{s}' "
                "UNION ALL SELECT 'function', p.proname, p.prokind::text FROM pg_proc p "
                f"JOIN pg_namespace n ON n.oid = p.pronamespace WHERE n.nspname = '{s}'")
        manifest = []
        if any(o[1] == "tree2sql_deployments" for o in objects):
            manifest = self.run("SELECT * FROM tree2sql_deployments")
        return sorted(map(tuple, objects)) + sorted(map(tuple, manifest))

    def load_iris(self, table: str = "flowers", first: int = 0, last: int = 150,
                  missing: tuple[str, ...] = ()) -> None:
        cols = [c for c in FEATURES if c not in missing]
        real = "DOUBLE PRECISION" if self.kind == "postgres" else "DOUBLE"
        if first == 0:
            self.run(f"CREATE TABLE {_quote(table)} (id INTEGER PRIMARY KEY, "
                     + ", ".join(f"{_quote(c)} {real}" for c in cols) + ")")
        rows = [(i, *map(float, IRIS.data.loc[i, cols])) for i in range(first, last)]
        marks = ", ".join("?" for _ in range(len(cols) + 1))
        self.run(f"INSERT INTO {_quote(table)} VALUES ({marks})", rows)


@pytest.fixture(params=["duckdb", "sqlite", "postgres"])
def target(request, tmp_path) -> Iterator[Target]:
    if request.param == "duckdb":
        path = tmp_path / "scores.duckdb"
        yield Target("duckdb", f"duckdb:///{path}", path)
    elif request.param == "sqlite":
        path = tmp_path / "scores.db"
        yield Target("sqlite", f"sqlite:///{path}", path)
    else:
        import sqlalchemy as sa

        url = request.getfixturevalue("pg_url")
        schema = f"t2s_deploy_{uuid.uuid4().hex[:10]}"
        engine = sa.create_engine(url)
        with engine.begin() as conn:
            conn.exec_driver_sql(f"CREATE SCHEMA {_quote(schema)}")
        try:
            yield Target("postgres", f"{url}?options=-csearch_path%3D{schema}",
                         sa_engine=engine, schema=schema)
        finally:
            with engine.begin() as conn:
                conn.exec_driver_sql(f"DROP SCHEMA {_quote(schema)} CASCADE")
            engine.dispose()


@pytest.fixture(scope="module")
def models(tmp_path_factory) -> dict[str, tuple[Path, RandomForestClassifier]]:
    """Two small forests on iris that differ (seed), saved as skops files."""
    folder = tmp_path_factory.mktemp("models")
    found = {}
    for name, seed in (("a", 0), ("b", 1)):
        model = RandomForestClassifier(n_estimators=10, max_depth=5, random_state=seed)
        model.fit(IRIS.data, IRIS.target)
        path = folder / f"iris_{name}.skops"
        skops.io.dump(model, path)
        found[name] = (path, model)
    return found


def tree2sql(*args: Any) -> Any:
    result = CliRunner().invoke(cli, [str(a) for a in args])
    return result


def deploy(target: Target, model: Path, form: str, name: str, *extra: Any) -> Any:
    return tree2sql("deploy", model, "--url", target.url, "--source", "flowers", "--key", "id",
                    "--as", form, "--name", name, *extra)


def assert_scores_match(rows: list[tuple], model: RandomForestClassifier) -> None:
    """Rows (id, p0, p1, p2, class) against scikit-learn's own answers for those ids."""
    ids = [int(r[0]) for r in rows]
    X = IRIS.data.iloc[ids]
    got = np.array([[float(v) for v in r[1:4]] for r in rows])
    assert np.abs(got - model.predict_proba(X)).max() <= TOLERANCE
    assert [int(r[4]) for r in rows] == model.predict(X).tolist()


def manifest(target: Target, name: str) -> list[dict[str, Any]]:
    result = tree2sql("status", "--url", target.url, "--all", "--json")
    assert result.exit_code == 0, result.output
    return [d for d in json.loads(result.output) if d["name"] == name]


def test_view_table_incremental_are_live_and_agree(target, models):
    path, model = models["a"]
    target.load_iris()
    for form in ("view", "table", "incremental"):
        result = deploy(target, path, form, f"iris_{form}")
        assert result.exit_code == 0, result.output
        assert "AGREE: 150 rows checked, 0 disagreements" in result.output
        assert "model-risk" in result.output  # the cautions are repeated
        rows = target.run(f"SELECT id, {', '.join(OUTPUTS)} FROM iris_{form} ORDER BY id")
        assert len(rows) == 150
        assert_scores_match(rows, model)
        [row] = manifest(target, f"iris_{form}")
        assert (row["form"], row["version"], row["active"]) == (form, 1, 1)
        assert row["verification"]["agrees"] is True
        assert row["statements"][0].startswith("-- tree2sql")
        assert f"sha256:{row['fingerprint']}" in row["statements"][0].splitlines()[1]


def test_function_form_where_the_engine_has_sql_functions(target, models):
    path, model = models["a"]
    target.load_iris()
    result = deploy(target, path, "function", "iris_score")
    if target.kind == "sqlite":  # SQLite has no SQL-defined functions
        assert result.exit_code == 2
        assert "no function form" in result.output
        return
    assert result.exit_code == 0, result.output
    assert "AGREE: 150 rows checked, 0 disagreements" in result.output
    args = ", ".join(_quote(c) for c in FEATURES)
    if target.kind == "duckdb":
        fields = ", ".join(f"struct_extract(r, '{c}')" for c in OUTPUTS)
        sql = f"SELECT id, {fields} FROM (SELECT id, iris_score({args}) AS r FROM flowers)"
    else:
        sql = f"SELECT f.id, s.* FROM flowers f CROSS JOIN LATERAL iris_score({args}) s"
    assert_scores_match(target.run(sql + " ORDER BY 1"), model)
    verify = tree2sql("verify", path, "--url", target.url, "--deployed", "iris_score",
                      "--sample", 40)
    assert verify.exit_code == 0, verify.output
    assert "AGREE: 40 rows checked" in verify.output


def test_incremental_adds_only_new_keys(target, models):
    path, model = models["a"]
    target.load_iris(last=100)
    assert deploy(target, path, "incremental", "iris_inc").exit_code == 0
    again = deploy(target, path, "incremental", "iris_inc")
    assert again.exit_code == 0, again.output
    assert "added 0 rows" in again.output
    assert target.run("SELECT COUNT(*) FROM iris_inc") == [(100,)]
    target.load_iris(first=100, last=150)
    third = deploy(target, path, "incremental", "iris_inc")
    assert "added 50 rows" in third.output, third.output
    rows = target.run(f"SELECT id, {', '.join(OUTPUTS)} FROM iris_inc ORDER BY id")
    assert [r[0] for r in rows] == list(range(150))
    assert_scores_match(rows, model)
    assert [d["version"] for d in manifest(target, "iris_inc")] == [1]  # runs, not versions


def _cli_process(target: Target, model: Path, name: str) -> subprocess.Popen:
    code = "import sys; from tree2sql.cli import main; sys.argv[0] = 'tree2sql'; main()"
    args = ["deploy", str(model), "--url", target.url, "--source", "flowers", "--key", "id",
            "--as", "incremental", "--name", name]
    return subprocess.Popen([sys.executable, "-c", code, *args], stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True)


def test_incremental_runs_overlapping_from_two_processes(target, models):
    path, model = models["a"]
    target.load_iris(last=120)
    for expected in (120, 150):
        runs = [_cli_process(target, path, "iris_inc") for _ in range(2)]
        outputs = [run.communicate(timeout=300)[0] for run in runs]
        assert [run.returncode for run in runs] == [0, 0], outputs
        count, distinct = target.run("SELECT COUNT(*), COUNT(DISTINCT id) FROM iris_inc")[0]
        assert count == distinct == expected  # no duplicates, nothing lost
        if expected == 120:
            target.load_iris(first=120, last=150)
    rows = target.run(f"SELECT id, {', '.join(OUTPUTS)} FROM iris_inc ORDER BY id")
    assert_scores_match(rows, model)
    assert [d["version"] for d in manifest(target, "iris_inc")] == [1]


def test_source_that_does_not_fit_changes_nothing(target, models):
    path, _ = models["a"]
    target.load_iris(missing=("petal width (cm)",))
    before = target.catalog()
    result = deploy(target, path, "view", "iris_view")
    assert result.exit_code == 2
    assert "petal width (cm)" in result.output
    assert target.catalog() == before


def test_failure_midway_rolls_everything_back(target, models):
    """The unique index of an incremental target collides with an existing index, after
    the manifest and the target table were created in the same transaction."""
    path, _ = models["a"]
    target.load_iris()
    target.run("CREATE TABLE other (x INTEGER)")
    target.run('CREATE INDEX "iris_inc_t2s_keys" ON other (x)')
    assert deploy(target, path, "view", "iris_view").exit_code == 0
    before = target.catalog()
    result = deploy(target, path, "incremental", "iris_inc")
    assert result.exit_code == 2, result.output
    assert "nothing was changed" in result.output
    assert target.catalog() == before


def test_dry_run_prints_statements_and_changes_nothing(target, models):
    path, _ = models["a"]
    target.load_iris()
    for attempt in ("fresh", "redeploy"):
        before = target.catalog()
        result = deploy(target, path, "table", "iris_table", "--dry-run")
        assert result.exit_code == 0, result.output
        assert "CREATE TABLE" in result.output and "tree2sql_deployments" in result.output
        # The profile's session settings (PostgreSQL: SET jit = off) come before any scoring.
        for setting in load_profile(target.kind).session_settings:
            assert -1 < result.output.find(setting) < result.output.find("CREATE TABLE")
        assert target.catalog() == before
        if attempt == "fresh":
            assert deploy(target, path, "table", "iris_table").exit_code == 0
    assert 'DROP TABLE "iris_table"' in result.output  # the redeploy replaces version 1


def test_status_and_restore_bring_back_the_previous_model(target, models):
    (path_a, model_a), (path_b, model_b) = models["a"], models["b"]
    target.load_iris()
    assert deploy(target, path_a, "view", "iris_view").exit_code == 0
    assert deploy(target, path_b, "table", "iris_view").exit_code == 0
    status = tree2sql("status", "--url", target.url)
    assert status.exit_code == 0
    line = next(x for x in status.output.splitlines() if x.startswith("iris_view"))
    assert line.split()[1:3] == ["table", "2"] and "agree 150 rows" in line
    query = f"SELECT id, {', '.join(OUTPUTS)} FROM iris_view ORDER BY id"
    assert_scores_match(target.run(query), model_b)

    restored = tree2sql("restore", "--url", target.url, "--name", "iris_view")
    assert restored.exit_code == 0, restored.output
    assert_scores_match(target.run(query), model_a)
    rows = manifest(target, "iris_view")
    assert [(d["version"], d["form"], d["active"]) for d in rows] == [(1, "view", 1),
                                                                      (2, "table", 0)]
    again = tree2sql("restore", "--url", target.url, "--name", "iris_view")
    assert again.exit_code == 2 and "no earlier version" in again.output


def test_live_verify_reports_a_tampered_table(target, models):
    path, _ = models["a"]
    target.load_iris()
    plain = tree2sql("verify", path, "--url", target.url, "--table", "flowers", "--key", "id",
                     "--sample", 60)
    assert plain.exit_code == 0, plain.output
    assert "AGREE: 60 rows checked, 0 disagreements" in plain.output
    assert deploy(target, path, "table", "iris_table").exit_code == 0
    target.run("UPDATE iris_table SET score_prob_0 = score_prob_0 + 0.25 WHERE id = 7")
    found = tree2sql("verify", path, "--url", target.url, "--deployed", "iris_table")
    assert found.exit_code == 1, found.output
    assert "DISAGREE: 150 rows checked, 1 disagreements" in found.output
    [row] = manifest(target, "iris_table")
    assert row["verification"]["agrees"] is False
    other = tree2sql("verify", models["b"][0], "--url", target.url, "--deployed", "iris_table")
    assert other.exit_code == 2 and "fingerprint" in other.output
