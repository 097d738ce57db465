"""Failure drills on a real PostgreSQL server: each provokes the failure for real.

1. a connection killed mid-deploy (pg_terminate_backend on that deploy's own backend);
2. a statement timeout (statement_timeout set in the URL);
3. concurrent deploys of one name from several processes;
4. concurrent incremental runs while new source rows arrive;
5. a redeploy that fails (lock_timeout behind a reader of the live version).

After each: a clean error (exit code 2, no traceback), no half-created object, the manifest
consistent with the catalog, no lost or duplicated scored rows.

Outside references for the assertions (PostgreSQL documentation):
- DDL runs inside the transaction and is undone by ROLLBACK like any other change ("BEGIN",
  "ROLLBACK"; CREATE/DROP TABLE and VIEW are not among the commands that refuse a transaction
  block), so a failed deploy leaves neither the new object nor the dropped old one missing.
- "Server Signaling Functions": pg_terminate_backend(pid) ends that one session; a session
  that ends without COMMIT has its transaction rolled back.
- "Client Connection Defaults": statement_timeout aborts any statement that runs longer than
  the limit, lock_timeout any statement waiting longer for a lock; "PostgreSQL Error Codes":
  57014 query_canceled, 55P03 lock_not_available, 57P01 admin_shutdown.
- "Advisory Locks": pg_advisory_xact_lock is held until the transaction ends, which is what
  makes deploys of one name take turns.
- "Transaction Isolation", Read Committed: each statement sees what was committed before it
  began, so a run that waited for another sees that run's rows.
Reference scores: scikit-learn's own predict_proba/predict on the iris data set (Fisher 1936,
UCI Machine Learning Repository, as bundled with scikit-learn).
"""

from __future__ import annotations

import re
import subprocess
import sys
import time
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
from tree2sql.deploy import name_key

IRIS = load_iris(as_frame=True)  # Fisher 1936, UCI ML repository
FEATURES = list(IRIS.data.columns)
OUTPUTS = ["score_prob_0", "score_prob_1", "score_prob_2", "score_class"]
TOLERANCE = 1e-12  # DESIGN.md, exactness rule 4
BIG = 300_000  # rows: about a second of scoring on the CI server, long enough to interrupt


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


@dataclass
class Drill:
    """One scratch schema on the shared server, reached with psycopg for set-up and checks."""

    base_url: str
    schema: str
    sa_engine: Any

    def url(self, app: str = "", **settings: str) -> str:
        """A deploy URL into the schema; `app` names the session in pg_stat_activity."""
        options = "%20".join(f"-c{k}%3D{v}" for k, v in
                             {"search_path": self.schema, **settings}.items())
        return f"{self.base_url}?options={options}" + (f"&application_name={app}" if app
                                                       else "")

    def run(self, sql: str, params: list[tuple] | None = None) -> list[tuple]:
        with self.sa_engine.begin() as conn:
            raw = conn.connection.cursor()
            raw.execute(f"SET LOCAL search_path TO {_quote(self.schema)}")
            if params:
                raw.executemany(sql, params)
                return []
            raw.execute(sql)
            return raw.fetchall() if raw.description else []

    def load_flowers(self, rows: int, first: int = 0) -> None:
        """Rows `first`..`rows`-1 of iris repeated: id i has the features of iris row i % 150."""
        if first == 0:
            self.run("CREATE TABLE iris0 (i INTEGER, "
                     + ", ".join(f"{_quote(c)} DOUBLE PRECISION" for c in FEATURES) + ")")
            self.run("INSERT INTO iris0 VALUES (%s, %s, %s, %s, %s)",
                     [(i, *map(float, IRIS.data.iloc[i])) for i in range(150)])
            self.run("CREATE TABLE flowers (id INTEGER PRIMARY KEY, "
                     + ", ".join(f"{_quote(c)} DOUBLE PRECISION" for c in FEATURES) + ")")
        cols = ", ".join(_quote(c) for c in FEATURES)
        self.run(f"INSERT INTO flowers SELECT g, {cols} FROM generate_series({first}, "
                 f"{rows - 1}) g JOIN iris0 ON iris0.i = g % 150")
        self.run("ANALYZE flowers")

    def relations(self) -> list[tuple[str, str]]:
        """(name, kind) of every relation and function in the schema, from pg_catalog."""
        s = self.schema.replace("'", "''")
        return sorted(map(tuple, self.run(
            "SELECT c.relname, c.relkind::text FROM pg_class c JOIN pg_namespace n "
            f"ON n.oid = c.relnamespace WHERE n.nspname = '{s}' UNION ALL "
            "SELECT p.proname, 'function' FROM pg_proc p JOIN pg_namespace n "
            f"ON n.oid = p.pronamespace WHERE n.nspname = '{s}'")))

    def manifest(self, name: str) -> list[tuple]:
        """(version, active, form, fingerprint) of `name`, or [] when there is no manifest."""
        if ("tree2sql_deployments", "r") not in self.relations():
            return []
        literal = name.replace("'", "''")
        return self.run("SELECT version, active, form, fingerprint FROM tree2sql_deployments "
                        f"WHERE name = '{literal}' ORDER BY version")

    def backend(self, app: str, query_start: str, waiting: bool | None,
                timeout: float = 60.0) -> int:
        """The pid of the session named `app` running a statement that starts with
        `query_start` (after the tree2sql header comment), waiting on a lock or running
        (`waiting` None: any session of that name, in any state)."""
        deadline = time.monotonic() + timeout
        wait = "" if waiting is None else " AND state = 'active' AND wait_event_type " + (
            "= 'Lock'" if waiting else "IS DISTINCT FROM 'Lock'")
        while time.monotonic() < deadline:
            found = self.run(
                "SELECT pid, query FROM pg_stat_activity WHERE datname = current_database() "
                f"AND application_name = '{app}'{wait}")
            for pid, query in found:
                if _statement(query).startswith(query_start):
                    return int(pid)
            time.sleep(0.02)
        raise AssertionError(f"no session {app} reached {query_start!r} in {timeout} s")

    def terminate(self, pid: int) -> None:
        """End that one backend (never any other: the server is shared)."""
        [(done,)] = self.run(f"SELECT pg_terminate_backend({int(pid)}, 10000)")
        assert done is True


def _statement(query: str) -> str:
    """The statement without the `-- ...` comment lines tree2sql puts before it."""
    return "\n".join(x for x in query.splitlines() if not x.startswith("--")).lstrip()


@pytest.fixture
def drill(pg_url) -> Iterator[Drill]:
    import sqlalchemy as sa

    schema = f"t2s_drill_{uuid.uuid4().hex[:10]}"
    engine = sa.create_engine(pg_url)
    with engine.begin() as conn:
        conn.exec_driver_sql(f"CREATE SCHEMA {_quote(schema)}")
    try:
        yield Drill(pg_url, schema, engine)
    finally:
        with engine.begin() as conn:
            conn.exec_driver_sql(f"DROP SCHEMA {_quote(schema)} CASCADE")
        engine.dispose()


@pytest.fixture(scope="module")
def models(tmp_path_factory) -> dict[str, tuple[Path, RandomForestClassifier, str]]:
    """Two different small forests on iris: (skops file, estimator, tree2sql fingerprint)."""
    from tree2sql.ingest import ingest

    folder = tmp_path_factory.mktemp("drill_models")
    found = {}
    for name, seed in (("a", 0), ("b", 1)):
        model = RandomForestClassifier(n_estimators=10, max_depth=5, random_state=seed)
        model.fit(IRIS.data, IRIS.target)
        path = folder / f"iris_{name}.skops"
        skops.io.dump(model, path)
        found[name] = (path, model, ingest(model).fingerprint())
    return found


def deploy_args(url: str, model: Path, form: str, name: str, *extra: Any) -> list[str]:
    return ["deploy", str(model), "--url", url, "--source", "flowers", "--key", "id",
            "--as", form, "--name", name, *map(str, extra)]


def start(args: list[str]) -> subprocess.Popen:
    """The command line in its own process, as a scheduler would run it."""
    code = "import sys; from tree2sql.cli import main; sys.argv[0] = 'tree2sql'; main()"
    return subprocess.Popen([sys.executable, "-c", code, *args], stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True)


def finish(process: subprocess.Popen) -> tuple[int, str]:
    output = process.communicate(timeout=120)[0]
    return process.returncode, output


def invoke(args: list[str]) -> tuple[int, str]:
    result = CliRunner().invoke(cli, args)
    return result.exit_code, result.output


def assert_clean_failure(code: int, output: str, *words: str) -> None:
    """Exit code 2 with an `error:` and a `fix:` line, never a traceback or exit 3."""
    assert code == 2, output
    assert "Traceback" not in output and "internal error" not in output, output
    assert "error:" in output and "fix:" in output, output
    for word in words:
        assert word in output, output


def assert_scores(drill: Drill, name: str, model: RandomForestClassifier,
                  every: int = 1) -> int:
    """The live object's scores (every `every`-th id) equal scikit-learn's; the row count."""
    rows = drill.run(f"SELECT id, {', '.join(OUTPUTS)} FROM {_quote(name)} "
                     f"WHERE id % {every} = 0 ORDER BY id")
    ids = np.array([int(r[0]) for r in rows])
    X = IRIS.data.iloc[ids % 150]
    got = np.array([[float(v) for v in r[1:4]] for r in rows])
    assert np.abs(got - model.predict_proba(X)).max() <= TOLERANCE
    assert [int(r[4]) for r in rows] == model.predict(X).tolist()
    return len(rows)


def report(capsys, line: str) -> None:
    with capsys.disabled():
        print(f"\ndrill: {line}")


def test_connection_killed_mid_deploy_leaves_nothing_behind(drill, models, capsys):
    """Killed while building the table (fresh name), then killed after dropping version 1
    and creating version 2, just before the manifest row: both roll back whole."""
    (path_a, model_a, print_a), (path_b, _, _) = models["a"], models["b"]
    drill.load_flowers(BIG)
    name, app = f"risk_{uuid.uuid4().hex[:6]}", f"t2s_drill_kill_{uuid.uuid4().hex[:8]}"

    nothing = sorted([("flowers", "r"), ("flowers_pkey", "i"), ("iris0", "r")])
    for stage in ("CREATE TABLE", "CREATE TEMPORARY TABLE"):  # the build, the live check
        fresh = start(deploy_args(drill.url(app), path_a, "table", name))
        drill.terminate(drill.backend(app, stage, waiting=False))
        code, output = finish(fresh)
        assert_clean_failure(code, output, "connection to the database was lost",
                             "nothing was changed")
        assert drill.relations() == nothing  # not even the manifest
        assert drill.manifest(name) == []

    code, output = invoke(deploy_args(drill.url(), path_a, "table", name, "--sample", 200))
    assert code == 0, output
    before = drill.relations()
    with drill.sa_engine.connect() as blocker:  # holds the manifest so the insert waits
        blocker.exec_driver_sql(f"SET search_path TO {_quote(drill.schema)}")
        blocker.exec_driver_sql("LOCK TABLE tree2sql_deployments IN SHARE MODE")
        redeploy = start(deploy_args(drill.url(app), path_b, "table", name))
        pid = drill.backend(app, 'INSERT INTO "tree2sql_deployments"', waiting=True)
        [(held,)] = drill.run(f"SELECT COUNT(*) FROM pg_locks WHERE pid = {pid} AND mode = "
                              "'AccessExclusiveLock' AND locktype = 'relation'")
        assert held >= 1  # it has dropped version 1 and created version 2 in its transaction
        drill.terminate(pid)
        blocker.rollback()
    code, output = finish(redeploy)
    assert_clean_failure(code, output, "connection to the database was lost")
    assert drill.relations() == before
    assert drill.manifest(name) == [(1, 1, "table", print_a)]
    checked = assert_scores(drill, name, model_a, every=97)
    report(capsys, f"connection killed mid-deploy (fresh {BIG}-row table: during the build "
                   f"and during the live check; redeploy holding {held} exclusive locks "
                   f"before its manifest row) -> exit 2 each time, no leftovers, "
                   f"version 1 still live and active ({checked} rows rechecked)")


def test_statement_timeout_rolls_back_and_names_the_fix(drill, models, capsys):
    path, model, fingerprint = models["a"]
    drill.load_flowers(BIG)
    name = f"risk_{uuid.uuid4().hex[:6]}"
    started = time.monotonic()
    code, output = invoke(deploy_args(drill.url(statement_timeout="250"), path, "table",
                                      name))
    took = time.monotonic() - started
    assert_clean_failure(code, output, "statement_timeout", "nothing was changed")
    assert drill.relations() == sorted([("flowers", "r"), ("flowers_pkey", "i"),
                                        ("iris0", "r")])
    assert drill.manifest(name) == []
    code, output = invoke(deploy_args(drill.url(statement_timeout="0"), path, "table", name,
                                      "--sample", 200))
    assert code == 0, output  # the fix the message names works
    assert drill.manifest(name) == [(1, 1, "table", fingerprint)]
    assert assert_scores(drill, name, model, every=149) > 0
    before = drill.relations()
    with drill.sa_engine.connect() as other:  # as if another deploy of this name were running
        other.exec_driver_sql(f"SELECT pg_advisory_xact_lock({name_key(name)})")
        code, output = invoke(deploy_args(drill.url(statement_timeout="200"), path, "view",
                                          name))
        other.rollback()
    assert_clean_failure(code, output, "statement_timeout", "nothing was changed")
    assert drill.relations() == before
    assert drill.manifest(name) == [(1, 1, "table", fingerprint)]
    report(capsys, f"statement_timeout=250ms on a {BIG}-row table deploy -> exit 2 after "
                   f"{took:.1f} s naming statement_timeout, nothing created; without the "
                   "timeout it deploys as version 1; a redeploy queued behind the name's "
                   "lock past statement_timeout=200ms -> exit 2, version 1 untouched")


def test_concurrent_deploys_of_one_name_take_turns(drill, models, capsys):
    drill.load_flowers(150)
    name = f"risk_{uuid.uuid4().hex[:6]}"
    attempts = [("a", "view"), ("b", "table"), ("a", "table"), ("b", "view")]
    others = [f"other_{uuid.uuid4().hex[:6]}" for _ in range(2)]  # first deploys elsewhere
    runs = [start(deploy_args(drill.url(), models[m][0], form, name, "--sample", 150))
            for m, form in attempts]
    runs += [start(deploy_args(drill.url(), models["a"][0], "view", other, "--sample", 150))
             for other in others]
    results = [finish(run) for run in runs]  # six processes race for a manifest not yet made
    assert [code for code, _ in results] == [0] * len(runs), results
    assert all(drill.manifest(other) == [(1, 1, "view", models["a"][2])] for other in others)
    rows = drill.manifest(name)
    assert [r[0] for r in rows] == list(range(1, len(attempts) + 1))  # no gap, no repeat
    [live] = [r for r in rows if r[1] == 1]
    model = next(m for _, m, fp in models.values() if fp == live[3])
    kind = {"view": "v", "table": "r"}[live[2]]
    assert (name, kind) in drill.relations()
    assert [r for r in drill.relations() if r[0] not in ("flowers", "flowers_pkey", "iris0",
            "tree2sql_deployments", "tree2sql_deployments_pkey", *others)] == [(name, kind)]
    assert assert_scores(drill, name, model) == 150  # the live object is the active model
    report(capsys, f"{len(attempts)} concurrent deploys of one name (view/table, two models) "
                   f"+ 2 first deploys of other names, into a schema with no manifest yet "
                   f"-> all exit 0, versions 1..{len(attempts)}, one active "
                   f"(version {live[0]}, {live[2]}), live object scores as its model")


def test_concurrent_incremental_runs_lose_and_repeat_nothing(drill, models, capsys):
    path, model, _ = models["a"]
    drill.load_flowers(600)
    name = f"scores_{uuid.uuid4().hex[:6]}"
    app = f"t2s_drill_inc_{uuid.uuid4().hex[:8]}"
    runs = [start(deploy_args(drill.url(app), path, "incremental", name, "--sample", 100))
            for _ in range(4)]
    drill.backend(app, "", waiting=None)  # the first run is connected
    total, during = 600, 0
    while any(run.poll() is None for run in runs):  # new rows committed while runs go on
        drill.load_flowers(total + 150, first=total)
        total += 150
        during += any(run.poll() is None for run in runs)
        time.sleep(0.15)
    results = [finish(run) for run in runs]
    assert [code for code, _ in results] == [0] * len(runs), results
    code, output = invoke(deploy_args(drill.url(), path, "incremental", name))
    assert code == 0, output  # the last run catches up rows committed after the others
    results.append((code, output))
    added = [int(m) for _, out in results
             for m in re.findall(r"(?:added|scored) (\d+) rows", out)]
    assert sum(added) == total, added  # every row counted once across the runs
    [(count, distinct)] = drill.run(f"SELECT COUNT(*), COUNT(DISTINCT id) FROM {name}")
    assert count == distinct == total  # no duplicated key, no lost key
    assert [r[:3] for r in drill.manifest(name)] == [(1, 1, "incremental")]
    assert assert_scores(drill, name, model) == total
    assert during >= 1  # rows really arrived while runs were going on
    report(capsys, f"{len(runs)} overlapping incremental runs + 1 catch-up while {total - 600} "
                   f"rows arrived in {during} batches during the runs -> {total} keys scored "
                   f"once each (added {added}), scores equal scikit-learn's, still version 1")


def test_failed_redeploy_keeps_the_previous_version_live(drill, models, capsys):
    """A reader holds the live view: a redeploy cannot drop it within lock_timeout; one
    without a timeout waits, and meanwhile a deploy of another name is not held up."""
    (path_a, model_a, print_a), (path_b, model_b, print_b) = models["a"], models["b"]
    drill.load_flowers(150)
    name, other = f"risk_{uuid.uuid4().hex[:6]}", f"other_{uuid.uuid4().hex[:6]}"
    app = f"t2s_drill_redeploy_{uuid.uuid4().hex[:8]}"
    assert invoke(deploy_args(drill.url(), path_a, "view", name))[0] == 0
    before = drill.relations()
    with drill.sa_engine.connect() as reader:
        reader.exec_driver_sql(f"SET search_path TO {_quote(drill.schema)}")
        reader.exec_driver_sql(f"SELECT COUNT(*) FROM {name}")  # its transaction stays open
        code, output = invoke(deploy_args(drill.url(lock_timeout="300"), path_b, "table",
                                          name))
        assert_clean_failure(code, output, "lock_timeout", "nothing was changed")
        assert drill.relations() == before
        assert drill.manifest(name) == [(1, 1, "view", print_a)]
        assert assert_scores(drill, name, model_a) == 150
        waiting = start(deploy_args(drill.url(app), path_b, "table", name))
        drill.backend(app, "DROP VIEW", waiting=True)  # holds the name's lock, waits
        started = time.monotonic()
        code, output = invoke(deploy_args(drill.url(statement_timeout="15000"), path_a,
                                          "view", other))
        assert code == 0, output  # another name goes ahead meanwhile
        alongside = time.monotonic() - started
        assert waiting.poll() is None  # still waiting for the reader
        assert reader.exec_driver_sql(f"SELECT COUNT(*) FROM {name}").scalar() == 150
        reader.rollback()
    code, output = finish(waiting)
    assert code == 0, output  # once the reader is gone the same redeploy goes through
    assert drill.manifest(name) == [(1, 0, "view", print_a), (2, 1, "table", print_b)]
    assert assert_scores(drill, name, model_b) == 150
    assert drill.manifest(other) == [(1, 1, "view", print_a)]
    report(capsys, "redeploy view->table blocked by a reader past lock_timeout=300ms -> "
                   "exit 2, version 1 view still live and active; a redeploy without the "
                   f"timeout waited while another name deployed in {alongside:.1f} s, then "
                   "became version 2 (no gap)")
