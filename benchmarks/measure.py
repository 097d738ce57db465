"""One engine, one SQL shape, one workload: every figure the benchmark reports.

Runs in a child process of its own (see run.py), so its peak memory is its own and an
engine that stalls can be stopped without losing the other figures.
"""

from __future__ import annotations

import resource
import time
import warnings
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from benchmarks.backends import SCORED, TABLE, open_backend
from benchmarks.workload import Workload, make_rows, trained_forest


def _clock(step: Callable[[], Any]) -> tuple[float, Any]:
    start = time.perf_counter()
    value = step()
    return time.perf_counter() - start, value


def peak_rss_bytes() -> int:
    """This process's peak resident memory (Linux reports ru_maxrss in KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def library_seconds(model: Any, X: np.ndarray, n_jobs: int | None) -> float:
    """scikit-learn's predict_proba on the rows in memory, with `n_jobs` threads."""
    model.n_jobs = n_jobs
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        seconds, _ = _clock(lambda: model.predict_proba(X))
    return seconds


def measure(engine: str, strategy: str | None, workload: Workload, workdir: Path,
            pg_url: str | None) -> dict[str, Any]:
    from tree2sql.compiler import ScoringRequest, compile_forest
    from tree2sql.dialects import load_profile
    from tree2sql.ingest import ingest

    model = trained_forest(workload, workdir)
    forest = ingest(model)
    X, _ = make_rows(workload.rows, workload.features)
    names = list(forest.feature_names)
    result: dict[str, Any] = {"engine": engine, "nodes": forest.n_nodes,
                              "depth": max(t.depth() for t in forest.trees)}
    # The rows are a stored table, which verify and deploy find with their catalog check.
    request = ScoringRequest(TABLE, ("id",), strategy=strategy, row_identity=True)
    # Loading the dialect (its profile and sqlglot's module for it) happens once per
    # process whatever the model: timed apart, so that nodes/s is the forest's own.
    result["startup_seconds"], _ = _clock(lambda: load_profile(engine))
    result["compile_seconds"], compiled = _clock(
        lambda: compile_forest(forest, request, engine))
    result["strategy"] = compiled.strategy
    result["statement_bytes"] = len(compiled.sql)
    result["setup_bytes"] = sum(map(len, compiled.setup))
    result["nodes_per_second"] = forest.n_nodes / max(result["compile_seconds"], 1e-9)

    backend = open_backend(engine, pg_url)
    try:
        result["load_seconds"], _ = _clock(lambda: backend.load(X, names))
        result["setup_seconds"], _ = _clock(
            lambda: [backend.execute(s) for s in compiled.setup])
        result["planning_seconds"], _ = _clock(lambda: backend.explain(compiled.sql))
        backend.drop(SCORED)
        result["scoring_seconds"], _ = _clock(lambda: backend.create_as(compiled.sql))
        result["library_seconds"] = library_seconds(model, X, -1)
        result["library_one_thread_seconds"] = library_seconds(model, X, 1)
        model.n_jobs = -1
        result["roundtrip_seconds"], _ = _clock(
            lambda: backend.roundtrip(names, model.predict_proba))
    finally:
        backend.close()
    scoring = result["scoring_seconds"]
    result["ratio_to_library"] = scoring / result["library_seconds"]
    result["ratio_to_roundtrip"] = scoring / result["roundtrip_seconds"]
    result["planning_share"] = result["planning_seconds"] / scoring
    result["peak_rss_bytes"] = peak_rss_bytes()
    return result
