"""`tree2sql demo`: the cold-chain example end to end on embedded DuckDB.

Steps: generate shipments (fixed seed) into a DuckDB file, train a random forest on a
sample, save it as skops, compile it, verify it row for row on held-out shipments, score
every shipment in place with one CREATE TABLE ... AS, and print the riskiest ones.
"""

from __future__ import annotations

import importlib.util
import time
from collections.abc import Callable
from pathlib import Path
from types import ModuleType

import numpy as np

from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.engines import DuckDBEngine
from tree2sql.ingest import ingest
from tree2sql.resources import data_dir

TRAIN_ROWS = 60_000
CHECK_ROWS = 50_000


def load_scenario() -> ModuleType:
    path = data_dir("examples") / "cold_chain" / "scenario.py"
    spec = importlib.util.spec_from_file_location("tree2sql_cold_chain", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def run_demo(rows: int, workdir: Path, echo: Callable[[str], None] = print) -> bool:
    """Run every step; returns True when verification finds no disagreement."""
    import skops.io
    from sklearn.ensemble import RandomForestClassifier

    from tree2sql.verify import verify

    scenario = load_scenario()
    workdir.mkdir(parents=True, exist_ok=True)
    db_path = workdir / "cold_chain.duckdb"
    db_path.unlink(missing_ok=True)
    timings: dict[str, float] = {}

    clock = time.perf_counter()
    columns = scenario.generate(rows)
    engine = DuckDBEngine(str(db_path))
    engine.con.register("generated", columns)
    engine.execute("CREATE TABLE shipments AS SELECT * FROM generated")
    engine.con.unregister("generated")
    timings["generate"] = time.perf_counter() - clock
    echo(f"1. generated {rows:,} shipments into {db_path} (table shipments)")

    clock = time.perf_counter()
    n_train = min(TRAIN_ROWS, rows // 2)
    X = np.column_stack([columns[f].astype(np.float64) for f in scenario.FEATURES])[:n_train]
    y = columns["outcome"][:n_train].astype(str)
    model = RandomForestClassifier(n_estimators=60, max_depth=9, min_samples_leaf=25,
                                   max_features="sqrt", random_state=7, n_jobs=-1)
    import pandas as pd  # only to give the model its feature names

    model.fit(pd.DataFrame(X, columns=scenario.FEATURES), y)
    model_path = workdir / "excursion_risk.skops"
    skops.io.dump(model, model_path)
    timings["train"] = time.perf_counter() - clock
    forest = ingest(model)
    echo(f"2. trained {forest.source}, {forest.n_nodes:,} nodes; saved {model_path}")

    clock = time.perf_counter()
    request = ScoringRequest(table="shipments", keys=("shipment_id",), prefix="risk_")
    compiled = compile_forest(forest, request, "duckdb")
    (workdir / "score_shipments.sql").write_text(compiled.sql + "\n", encoding="utf-8")
    timings["compile"] = time.perf_counter() - clock
    echo(f"3. compiled to {len(compiled.sql):,} bytes of DuckDB SQL ({compiled.reason}); "
         f"saved {workdir / 'score_shipments.sql'}")

    clock = time.perf_counter()
    check_rows = min(CHECK_ROWS, rows - n_train)
    engine.execute(f"CREATE TEMP TABLE holdout AS SELECT * FROM shipments "
                   f"WHERE shipment_id > {n_train} ORDER BY shipment_id LIMIT {check_rows}")
    check = ScoringRequest(table="holdout", keys=("shipment_id",), prefix="risk_")
    report = verify(model, forest, engine, check)
    timings["verify"] = time.perf_counter() - clock
    echo(f"4. verified on {report.rows:,} held-out shipments: {report.disagreements} "
         f"disagreements, largest probability difference {report.max_abs_diff:.3g}, "
         f"{report.ties} ties, {report.null_scores} NULL scores")

    clock = time.perf_counter()
    engine.execute(f"CREATE OR REPLACE TABLE shipment_risk AS\n{compiled.sql}")
    timings["score in place"] = time.perf_counter() - clock
    clock = time.perf_counter()
    model.predict_proba(pd.DataFrame(
        np.column_stack([columns[f].astype(np.float64) for f in scenario.FEATURES]),
        columns=scenario.FEATURES))
    timings["scikit-learn predict_proba, same rows in memory"] = time.perf_counter() - clock
    echo(f"5. scored all {rows:,} shipments in place into table shipment_risk")

    top = engine.con.execute(
        "SELECT r.shipment_id, r.risk_prob_excursion, s.transit_hours, s.ambient_temp_c, "
        "s.handoffs, s.door_openings, s.battery_pct FROM shipment_risk r "
        "JOIN shipments s USING (shipment_id) "
        "ORDER BY r.risk_prob_excursion DESC, r.shipment_id LIMIT 10").fetchall()
    echo("\nRiskiest shipments:")
    echo(f"{'shipment':>10} {'p(excursion)':>13} {'hours':>7} {'ambient':>8} "
         f"{'handoffs':>8} {'doors':>6} {'battery':>8}")
    for sid, p, hours, ambient, handoffs, doors, battery in top:
        battery_text = "-" if battery is None else f"{battery:.0f}"
        echo(f"{sid:>10} {p:>13.3f} {hours:>7.1f} {ambient:>8.1f} {handoffs:>8} {doors:>6} "
             f"{battery_text:>8}")
    echo("\nTimings (seconds):")
    for step, seconds in timings.items():
        echo(f"  {step:<48} {seconds:8.2f}")
    engine.close()
    return report.agrees
