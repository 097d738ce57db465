"""PostgreSQL's scan_groups shape: groups of trees walked by scans of their own, joined on
each row's physical identity, agree exactly with scikit-learn, and are taken only where
that identity exists (a stored table, checked in the catalog; never a view).

References outside the project: scikit-learn's own predict_proba (via tree2sql.verify),
the datasets scikit-learn bundles (sources in tests/engine_rows.py), and PostgreSQL's
documented system columns `tableoid` and `ctid` ("System Columns"), run on a real server.
"""

from __future__ import annotations

import uuid

import pytest
from engine_rows import KEY, assert_bar, cases, load_rows, score

from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.deploy import DeployRequest, Form, deploy
from tree2sql.dialects import load_profile
from tree2sql.engines import connect
from tree2sql.live_verify import verify_compiled
from tree2sql.schema import with_row_identity
from tree2sql.strategies import scan_groups
from tree2sql.verify import verify


@pytest.fixture
def small_scans(monkeypatch: pytest.MonkeyPatch) -> None:
    """Five trees per scan, so the 12-tree test forests take three scans and two joins."""
    monkeypatch.setattr(scan_groups, "TREES_PER_SCAN", 5)


@pytest.fixture
def pg(pg_url):
    """A connection whose tables live in a schema of their own, dropped afterwards."""
    schema = f"t2s_scan_{uuid.uuid4().hex[:10]}"
    engine = connect(pg_url)
    engine.execute(f'CREATE SCHEMA "{schema}"')
    engine.execute(f'SET search_path TO "{schema}"')
    yield engine
    engine.execute(f'DROP SCHEMA "{schema}" CASCADE')
    engine.close()


def test_groups_are_consecutive_and_near_equal() -> None:
    assert scan_groups.scan_groups(100) == [range(i, i + 20) for i in range(0, 100, 20)]
    assert scan_groups.scan_groups(30) == [range(0, 15), range(15, 30)]
    assert scan_groups.scan_groups(41) == [range(0, 14), range(14, 27), range(27, 41)]
    assert scan_groups.scan_groups(7) == [range(0, 7)]


def test_planner_takes_it_only_for_a_checked_table(small_scans) -> None:
    forest = cases()["wine"].forest  # 12 trees
    unknown = compile_forest(forest, ScoringRequest("t", (KEY,)), "postgres")
    assert unknown.strategy == "case_leaves"
    assert "not scan_groups: it joins on each row's physical identity" in unknown.reason
    table = compile_forest(forest, ScoringRequest("t", (KEY,), row_identity=True), "postgres")
    assert table.strategy == "scan_groups"
    assert table.sql.count("\nJOIN (") == 2  # three scans of 4 trees each
    # The first two scans' join is fenced, so the third joins its result: the statement's
    # join order is the plan's.
    assert table.sql.count('WITH "__t2s_fence" AS (SELECT 1)\nSELECT *\nFROM (') == 1
    assert table.sql.count(') AS "__t2s_join1"\nJOIN (') == 1
    assert 'tableoid AS "__t2s_row0"' in table.sql and 'ctid AS "__t2s_row1"' in table.sql
    assert '"__t2s_checked" AS NOT MATERIALIZED (' in table.sql
    forced = compile_forest(forest, ScoringRequest("t", (KEY,), strategy="scan_groups"),
                            "postgres")
    assert "beware: it joins on each row's physical identity" in forced.reason


def test_one_scan_is_left_to_case_leaves() -> None:
    """Twelve trees fit one scan of 20: the join would buy nothing."""
    compiled = compile_forest(cases()["wine"].forest,
                              ScoringRequest("t", (KEY,), row_identity=True), "postgres")
    assert compiled.strategy == "case_leaves"
    assert "12 trees fit one scan" in compiled.reason


def test_engines_without_a_row_identity_are_left_alone() -> None:
    engine = connect(None)  # DuckDB: its profile names no row identity
    request = ScoringRequest("t", (KEY,))
    assert with_row_identity(engine, request) is request
    engine.close()


@pytest.mark.parametrize("name", ["breast_cancer_missing", "iris", "diabetes"])
def test_several_scans_agree(pg, small_scans, name) -> None:
    """NaN and NULL cells, float32 boundary rows and refused rows through three scans."""
    case = cases()[name]
    report = score(pg, case, "scan_groups")
    assert report.strategy == "scan_groups"
    assert_bar(report, case)


def test_verify_finds_the_identity_of_tables_and_not_views(pg, small_scans) -> None:
    """`verify --url --table` checks the shape the source would get, though it scores a
    sample copied into a temporary table (which has the identity)."""
    case = cases()["breast_cancer_missing"]
    profile = load_profile("postgres")
    names = case.forest.feature_names
    load_rows(pg, profile, "plain", case.X, names, case.null_mask)
    pg.execute('CREATE VIEW "seen" AS SELECT * FROM "plain"')
    for table, shape in (("plain", "scan_groups"), ("seen", "case_leaves")):
        report = verify_compiled(case.estimator, case.forest, pg,
                                 ScoringRequest(table, (KEY,)), rows=None)
        assert report.strategy == shape
        assert_bar(report, case)


def test_partitions_repeat_ctids_and_the_table_oid_keeps_rows_apart(pg, small_scans) -> None:
    """Each partition numbers its rows' places from the start, so ctid alone would join
    rows of different partitions; (tableoid, ctid) does not."""
    case = cases()["iris"]
    profile = load_profile("postgres")
    names = case.forest.feature_names
    load_rows(pg, profile, "staged", case.X, names, case.null_mask)
    columns = ", ".join(f'"{n}" DOUBLE PRECISION' for n in names)
    pg.execute(f'CREATE TABLE "split" ("{KEY}" INTEGER, {columns}) '
               f'PARTITION BY RANGE ("{KEY}")')
    half = len(case.X) // 2
    pg.execute(f'CREATE TABLE "split_a" PARTITION OF "split" FOR VALUES FROM (MINVALUE) '
               f"TO ({half})")
    pg.execute(f'CREATE TABLE "split_b" PARTITION OF "split" FOR VALUES FROM ({half}) '
               "TO (MAXVALUE)")
    pg.execute('INSERT INTO "split" SELECT * FROM "staged"')
    repeated = pg.query('SELECT COUNT(*) - COUNT(DISTINCT ctid) AS n FROM "split"')
    assert int(repeated["n"][0]) > 0  # the hazard is real in this table
    request = with_row_identity(pg, ScoringRequest("split", (KEY,)))
    assert request.row_identity
    report = verify(case.estimator, case.forest, pg, request)  # the table itself, no sample
    assert report.strategy == "scan_groups"
    assert_bar(report, case)


@pytest.mark.parametrize("form, shape", [(Form.TABLE, "scan_groups"),
                                         (Form.INCREMENTAL, "case_leaves"),
                                         (Form.VIEW, "case_leaves")])
def test_deploy_over_a_table_uses_it_and_verifies_live(pg, small_scans, form, shape) -> None:
    """A table, which scores every row, takes scan_groups; a view, which filters reach only
    without the joins, and an incremental insert, which scores only new rows, keep
    case_leaves."""
    case = cases()["wine"]
    load_rows(pg, load_profile("postgres"), "bottles", case.X, case.forest.feature_names,
              case.null_mask)
    request = DeployRequest(f"wine_{form.value}", form, ScoringRequest("bottles", (KEY,)))
    result, report = deploy(pg, case.estimator, case.forest, request)
    assert result.compiled.strategy == shape
    assert report is not None and report.agrees, report.to_text()
    assert report.rows > 0


def test_scans_joins_and_sums_run_in_the_parallel_workers(pg, small_scans) -> None:
    """The profile's fence (a WITH clause, not OFFSET 0, which keeps a subquery out of the
    workers) and settings let PostgreSQL's planner put one Gather above the joins, so the
    scans, the hash joins and the sums all run in the parallel workers, joined in the
    statement's order so that each hash table holds one scan's rows. Checked in the
    server's own plan (PostgreSQL documentation, "EXPLAIN"). The test table is small: the
    three cost settings make the plan the one the benchmark's 1M rows and deep trees get
    (parallel scans considered for any table, and expressions priced as if large)."""
    case = cases()["wine"]
    profile = load_profile("postgres")
    load_rows(pg, profile, "cellar", case.X, case.forest.feature_names, case.null_mask)
    compiled = compile_forest(case.forest, ScoringRequest("cellar", (KEY,), row_identity=True),
                              profile)
    assert compiled.strategy == "scan_groups"
    for statement in [*compiled.setup, "SET min_parallel_table_scan_size = 0",
                      "SET parallel_setup_cost = 0", "SET cpu_operator_cost = 1"]:
        pg.execute(statement)
    plan = [line.strip() for line in pg.query(f"EXPLAIN {compiled.sql}")["QUERY PLAN"]]
    nodes = [line.removeprefix("->  ").split("  (")[0] for line in plan]
    assert nodes.count("Gather") == 1, plan
    below = nodes[nodes.index("Gather") + 1:]
    assert sum(node == "Parallel Hash Join" for node in below) == 2, plan
    assert sum(node.startswith("Parallel Seq Scan on cellar") for node in below) == 3, plan
    # Each hash table holds one scan's rows, never a join's (whose row count the planner
    # overestimates by orders of magnitude, and sizes its batches on disk by).
    hashed = [below[i + 1] for i, node in enumerate(below) if node == "Parallel Hash"]
    assert len(hashed) == 2, plan
    assert all(node.startswith(("Parallel Seq Scan", "Subquery Scan")) for node in hashed), plan


def test_a_filter_on_a_deployed_view_reaches_the_table(pg, small_scans) -> None:
    """`SELECT ... FROM view WHERE key = ...` reads the source through its key's index, not
    every row: no stage of the view is stored or joined, so PostgreSQL pushes the filter
    down to the table (PostgreSQL documentation, "EXPLAIN"; seq scans discouraged so that
    the index is taken wherever the filter reaches the table)."""
    case = cases()["wine"]
    load_rows(pg, load_profile("postgres"), "bottles", case.X, case.forest.feature_names,
              case.null_mask)
    pg.execute(f'ALTER TABLE "bottles" ADD PRIMARY KEY ("{KEY}")')
    request = DeployRequest("wine_scores", Form.VIEW, ScoringRequest("bottles", (KEY,)))
    deploy(pg, case.estimator, case.forest, request)
    pg.execute("SET enable_seqscan = off")
    plan = "\n".join(pg.query(f'EXPLAIN SELECT * FROM "wine_scores" WHERE "{KEY}" = 7')
                     ["QUERY PLAN"])
    assert "Index Scan using bottles_pkey on bottles" in plan, plan
    assert "Seq Scan" not in plan and "CTE Scan" not in plan, plan
    one = pg.query(f'SELECT * FROM "wine_scores" WHERE "{KEY}" = 7')
    every = pg.query('SELECT * FROM "wine_scores"')
    row = list(every[KEY]).index(7)
    assert all(one[c][0] == every[c][row] for c in one), (one, row)


def test_an_incremental_run_scores_only_new_rows(pg, small_scans) -> None:
    """The insert leaves out the source rows whose keys the target holds before any tree is
    walked: in PostgreSQL's plan the scan of the source sits under an anti-join with the
    target, besides the insert's own check of the scored rows (PostgreSQL documentation,
    "EXPLAIN"), and a run adds exactly the new rows."""
    case = cases()["wine"]
    profile = load_profile("postgres")
    nulls = None if case.null_mask is None else case.null_mask[:100]
    load_rows(pg, profile, "bottles", case.X[:100], case.forest.feature_names, nulls)
    request = DeployRequest("wine_inc", Form.INCREMENTAL, ScoringRequest("bottles", (KEY,)))
    plan, _ = deploy(pg, case.estimator, case.forest, request)
    insert = next(s for s in plan.statements if 'INSERT INTO "wine_inc"' in s)
    assert 'WHERE NOT EXISTS (SELECT 1 FROM "wine_inc" "__t2s_old" WHERE ' in insert
    for setting in profile.session_settings:
        pg.execute(setting)
    select = insert[insert.index("SELECT"):].replace("\nON CONFLICT DO NOTHING", "")
    lines = [line.strip() for line in pg.query(f"EXPLAIN {select}")["QUERY PLAN"]]
    scans = [line for line in lines if "Scan on bottles" in line]
    anti = [line for line in lines if "Anti Join" in line]
    assert len(scans) == 1 and len(anti) == 2, lines
    assert int(pg.query('SELECT COUNT(*) AS n FROM "wine_inc"')["n"][0]) == 100
