"""Memory of compiling and verifying a fully grown forest: `python -m benchmarks.memory`.

Trains (once, cached in the work directory) a random forest with no depth limit, then in
two child processes of their own, so each peak is its own: (1) ingest and compile it for
a dialect; (2) ingest, compile and verify it on embedded DuckDB against scikit-learn's own
predictions. Prints nodes, statement bytes, seconds and peak resident memory of each, and
writes them as JSON.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import pickle
import sys
import time
from pathlib import Path
from typing import Any

if __package__ in (None, ""):  # run as `python benchmarks/memory.py`
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.measure import peak_rss_bytes  # noqa: E402
from benchmarks.workload import SEED, make_rows  # noqa: E402

GIB = 2 ** 30


def parse(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.memory", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--trees", type=int, default=500)
    parser.add_argument("--train-rows", type=int, default=20_000,
                        help="rows the fully grown trees are trained on (nodes grow with it)")
    parser.add_argument("--features", type=int, default=20)
    parser.add_argument("--rows", type=int, default=20_000, help="rows verified")
    parser.add_argument("--dialect", default="duckdb", help="dialect compiled in step 1")
    parser.add_argument("--workdir", type=Path, default=Path(".benchmarks"))
    parser.add_argument("--out", type=Path, help="JSON (default WORKDIR/memory.json)")
    return parser.parse_args(argv)


def grown_forest(args: argparse.Namespace) -> Path:
    """Path of the pickled fully grown forest, trained on first use."""
    from sklearn.ensemble import RandomForestClassifier

    path = args.workdir / f"grown-{args.trees}trees-{args.features}f-{args.train_rows}.pickle"
    if not path.is_file():
        X, y = make_rows(args.train_rows, args.features, SEED + 1)
        model = RandomForestClassifier(n_estimators=args.trees, max_depth=None,
                                       random_state=SEED, n_jobs=-1).fit(X, y)
        args.workdir.mkdir(parents=True, exist_ok=True)
        with path.open("wb") as handle:  # written and read by this benchmark only
            pickle.dump(model, handle)
    return path


def _load(path: Path) -> Any:
    with path.open("rb") as handle:
        return pickle.load(handle)


def compile_step(path: Path, dialect: str) -> dict[str, Any]:
    from tree2sql.compiler import ScoringRequest, compile_forest
    from tree2sql.ingest import ingest

    start = time.perf_counter()
    forest = ingest(_load(path))
    compiled = compile_forest(forest, ScoringRequest("rows", ("id",)), dialect)
    seconds = time.perf_counter() - start
    return {"step": f"compile ({dialect})", "strategy": compiled.strategy,
            "nodes": forest.n_nodes, "statement_bytes": len(compiled.sql),
            "seconds": seconds, "peak_rss_bytes": peak_rss_bytes()}


def verify_step(path: Path, rows: int, features: int) -> dict[str, Any]:
    import pandas as pd

    from tree2sql.compiler import ScoringRequest
    from tree2sql.engines import DuckDBEngine
    from tree2sql.ingest import ingest
    from tree2sql.verify import verify

    model = _load(path)
    X, _ = make_rows(rows, features)
    start = time.perf_counter()
    forest = ingest(model)
    engine = DuckDBEngine()
    frame = pd.DataFrame(X, columns=list(forest.feature_names))
    frame.insert(0, "id", range(len(X)))
    engine.con.register("memory_rows", frame)
    engine.execute("CREATE TABLE rows AS SELECT * FROM memory_rows")
    engine.con.unregister("memory_rows")
    del frame, X
    report = verify(model, forest, engine, ScoringRequest("rows", ("id",)))
    return {"step": "verify (duckdb)", "strategy": report.strategy, "nodes": forest.n_nodes,
            "rows": report.rows, "disagreements": report.disagreements,
            "max_abs_diff": report.max_abs_diff, "seconds": time.perf_counter() - start,
            "peak_rss_bytes": peak_rss_bytes()}


def _child(queue: Any, step: str, *params: Any) -> None:
    try:
        queue.put({"compile": compile_step, "verify": verify_step}[step](*params))
    except Exception as exc:  # report the failure as the step's result
        queue.put({"step": step, "error": f"{type(exc).__name__}: {exc}"[:500]})


def run_step(step: str, *params: Any) -> dict[str, Any]:
    context = multiprocessing.get_context("spawn")
    queue = context.Queue()
    child = context.Process(target=_child, args=(queue, step, *params))
    child.start()
    result = queue.get()
    child.join()
    return result


def main(argv: list[str] | None = None) -> int:
    args = parse(argv)
    start = time.perf_counter()
    path = grown_forest(args)
    print(f"{args.trees} fully grown trees ready in {time.perf_counter() - start:.1f}s",
          flush=True)
    results = [run_step("compile", path, args.dialect),
               run_step("verify", path, args.rows, args.features)]
    for r in results:
        if "error" in r:
            print(f"  {r['step']:18s} ERROR {r['error']}")
            continue
        extra = (f"  {r['rows']:,} rows, {r['disagreements']} disagreements"
                 if "rows" in r else f"  statement {r['statement_bytes'] / 1e6:.0f} MB")
        print(f"  {r['step']:18s} {r['strategy']:12s} {r['nodes']:,} nodes  "
              f"{r['seconds']:6.1f}s  peak {r['peak_rss_bytes'] / GIB:.2f} GiB{extra}")
    out = args.out or args.workdir / "memory.json"
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(json.dumps({"args": {k: str(v) for k, v in vars(args).items()},
                               "results": results}, indent=2) + "\n")
    print(f"results: {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
