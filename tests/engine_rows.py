"""Shared by the per-engine tests (tests/test_engines_*.py): models on bundled datasets,
edge rows, a loader that puts numpy rows into any engine, and the agreement bar.

Rows go in as SQL literals written by the dialect profile, so every load also checks that
the profile's double literals round-trip on that engine (DESIGN.md rule 2): a literal that
parsed to a neighbouring double would move a row across a float32 boundary and show up as a
disagreement. NaN and NULL cells go in as the engine's NaN and as NULL respectively.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from sklearn import datasets
from sklearn.ensemble import RandomForestClassifier, RandomForestRegressor

from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.dialects import Profile, load_profile
from tree2sql.engines import Engine
from tree2sql.exact import FLOAT32_MAX, bounds
from tree2sql.forest import LEAF, Forest
from tree2sql.ingest import ingest
from tree2sql.verify import Report, verify

KEY = "row_id"
BATCH = 400
_LOADED: set[tuple[int, str]] = set()  # (engine, table) pairs already holding a case's rows
TOLERANCE = 1e-12


@dataclass(frozen=True)
class Case:
    """A fitted model and the rows to check it on (NaN cells, some of them to be NULL)."""

    name: str
    estimator: Any
    forest: Forest
    X: np.ndarray
    null_mask: np.ndarray


def cell(profile: Profile, value: float, null: bool) -> str:
    if null:
        return "NULL"
    if math.isnan(value):
        return profile.nan_literal or "NULL"
    if math.isinf(value):
        if profile.infinity_literal is None:
            return "NULL"
        return profile.infinity_literal if value > 0 else f"-{profile.infinity_literal}"
    return profile.double(value)


def load_rows(engine: Engine, profile: Profile, table: str, X: np.ndarray,
              names: Sequence[str], null_mask: np.ndarray | None = None) -> None:
    """(Re)create `table` (key, one double column per name) and insert X as literals."""
    p, name = profile, profile.quote(table)
    engine.execute(p.render_ddl("drop_table", name=name))
    columns = [f"{p.quote(KEY)} {p.integer_type}",
               *(f"{p.quote(n)} {p.double_type}" for n in names)]
    engine.execute(p.render_ddl("model_table", name=name, columns=", ".join(columns)))
    quoted = ", ".join(p.quote(n) for n in [KEY, *names])
    nulls = np.zeros(X.shape, dtype=bool) if null_mask is None else null_mask
    for start in range(0, len(X), BATCH):
        rows = p.ddl["insert_row_separator"].join(
            p.ddl["insert_row"].format(values=", ".join(
                [str(i)] + [cell(p, float(v), bool(m)) for v, m in zip(X[i], nulls[i],
                                                                          strict=True)]))
            for i in range(start, min(start + BATCH, len(X))))
        engine.execute(p.render_ddl("insert", name=name, columns=quoted, rows=rows))


def float32_boundary_rows(forest: Forest, X: np.ndarray, splits: int = 60) -> np.ndarray:
    """Rows that put a split's feature exactly on the float32 rounding boundaries.

    For threshold t: the largest float32 at most t, the next float32 up, the SQL bound
    (the midpoint rule of DESIGN.md) and the doubles either side of it, as numpy's
    nextafter gives them (IEEE 754).
    """
    base = np.nanmedian(X, axis=0)
    rows = []
    for tree in forest.trees:
        for node in np.flatnonzero(tree.left != LEAF)[:max(1, splits // len(forest.trees))]:
            t = float(tree.threshold[node])
            b = float(bounds(np.array([t]), forest.comparison)[0])
            f32 = np.float32(t)
            below = float(f32) if float(f32) <= t else float(np.nextafter(f32, np.float32(-1e38)))
            above = float(np.nextafter(np.float32(below), np.float32(np.inf)))
            for value in (t, below, above, b, np.nextafter(b, -np.inf), np.nextafter(b, np.inf)):
                row = base.copy()
                row[int(tree.feature[node])] = value
                rows.append(row)
    return np.array(rows)


def edge_rows(X: np.ndarray) -> np.ndarray:
    """Rows the library refuses (infinite, beyond float32) and all-missing rows."""
    extreme = np.repeat(np.nanmedian(X, axis=0)[None, :], 6, axis=0)
    extreme[0, 0], extreme[1, 0], extreme[2, 1] = np.inf, -np.inf, 1e39
    extreme[3, 1], extreme[4, :], extreme[5, 0] = FLOAT32_MAX, np.nan, -FLOAT32_MAX
    return extreme


def _case(name: str, estimator: Any, X: np.ndarray, y: np.ndarray, seed: int,
          missing_share: float = 0.0) -> Case:
    rng = np.random.default_rng(seed)
    if missing_share:
        X = X.copy()
        X[rng.random(X.shape) < missing_share] = np.nan
    estimator.fit(X, y)
    forest = ingest(estimator)
    rows = np.vstack([X, float32_boundary_rows(forest, X), edge_rows(X)])
    # Half the NaN cells become SQL NULL; the rest stay floating NaN in the engine.
    null_mask = np.isnan(rows) & (rng.random(rows.shape) < 0.5)
    return Case(name, estimator, forest, rows, null_mask)


@functools.cache
def cases() -> dict[str, Case]:
    """Small forests on the datasets scikit-learn bundles, each named with its source."""
    forest_args = {"n_estimators": 12, "max_depth": 7, "random_state": 0, "n_jobs": 1}
    return {c.name: c for c in [
        # iris: R. A. Fisher (1936), Annals of Eugenics 7(2); UCI ML repository.
        _case("iris", RandomForestClassifier(**forest_args), *datasets.load_iris(
            return_X_y=True), seed=1),
        # wine: M. Forina et al., PARVUS (1988); UCI ML repository "Wine".
        _case("wine", RandomForestClassifier(**forest_args), *datasets.load_wine(
            return_X_y=True), seed=2),
        # breast cancer Wisconsin (diagnostic): Street, Wolberg & Mangasarian (1993); UCI.
        # Trained with 8% of cells missing, so splits carry a learned missing direction.
        _case("breast_cancer_missing", RandomForestClassifier(**forest_args),
              *datasets.load_breast_cancer(return_X_y=True), seed=3, missing_share=0.08),
        # diabetes: Efron, Hastie, Johnstone & Tibshirani (2004), "Least Angle Regression".
        _case("diabetes", RandomForestRegressor(**forest_args), *datasets.load_diabetes(
            return_X_y=True), seed=4),
    ]}


def with_levels(profile: Profile, levels: int) -> Profile:
    """The profile with depth_staged walking `levels` tree levels per stage."""
    return replace(profile, raw={**profile.raw, "stage_levels": levels})


def score(engine: Engine, case: Case, strategy: str, profile: Profile | None = None) -> Report:
    """Load the case's rows into `engine`, compile for its dialect, verify row for row."""
    profile = profile or load_profile(engine.dialect)
    table = f"t2s_rows_{case.name}"
    if (id(engine), table) not in _LOADED:  # loading is slow on Spark: once per engine
        load_rows(engine, profile, table, case.X, case.forest.feature_names, case.null_mask)
        _LOADED.add((id(engine), table))
    request = ScoringRequest(table=table, keys=(KEY,), strategy=strategy)
    compiled = compile_forest(case.forest, request, profile)
    return verify(case.estimator, case.forest, engine, request, compiled=compiled)


def assert_bar(report: Report, case: Case) -> None:
    """The issue's bar: no disagreement of any kind, |dp| <= 1e-12, every row checked."""
    assert report.rows == len(case.X), report.to_text()
    assert report.disagreements == 0, report.to_text()
    assert report.label_disagreements == 0, report.to_text()
    assert report.null_mismatches == 0, report.to_text()
    assert report.max_abs_diff <= TOLERANCE, report.to_text()
    # The infinite and beyond-float32 edge rows were scored NULL, not silently dropped.
    assert report.null_refused >= 3 and report.null_scores >= 3, report.to_text()


def strategies_for(dialect: str) -> list[str]:
    """Every strategy the dialect can run: those its profile lists, plus the two inline
    portable ones (a profile leaves model_table out only where it was measured unusable)."""
    listed = list(load_profile(dialect).strategies)
    return listed + [s for s in ("nested_case", "depth_staged") if s not in listed]


def open_engine(dialect: str) -> Engine:
    """A real engine for an executed dialect; skipped locally, failed in CI when absent."""
    import importlib.util
    import os
    import tempfile

    from conftest import need

    from tree2sql.engines import connect

    if dialect == "duckdb":
        return connect(None)
    if dialect == "sqlite":
        return connect("sqlite:///" + os.path.join(tempfile.mkdtemp(), "rows.db"))
    if dialect == "postgres":
        url = os.environ.get("TREE2SQL_PG_URL", "")
        need(bool(url), "PostgreSQL: run `eval \"$(bash .ci/services.sh)\"` to start one")
        return connect(url)
    module = "chdb" if dialect == "clickhouse" else "pyspark"
    need(importlib.util.find_spec(module) is not None, f"{module} is not installed")
    return connect("chdb://" if dialect == "clickhouse" else "spark://local[2]")
