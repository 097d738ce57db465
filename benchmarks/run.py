"""Benchmark command: `python -m benchmarks.run [options]` (see benchmarks/README.md).

For each workload (the configured forest, and a fully grown one), engine and SQL shape it
compiles the forest, loads the rows, and reports compile seconds, statement bytes,
planning, scoring, peak memory, and the ratios of in-engine scoring to scikit-learn's
predict_proba and to export -> predict -> import, all measured in the same run. Each
measurement runs in a child process with a time limit, so a stalling engine is reported
as such and the rest still run.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import platform
import sys
import time
from pathlib import Path
from typing import Any

if __package__ in (None, ""):  # run as `python benchmarks/run.py`
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.workload import Workload, trained_forest  # noqa: E402

ENGINES = ("duckdb", "clickhouse", "postgres", "sqlite", "spark")
QUICK = {"rows": 100_000, "trees": 20, "grown_trees": 5, "train_rows": 5_000}


def parse(argv: list[str] | None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.run", description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, default=1_000_000, help="rows scored")
    parser.add_argument("--trees", type=int, default=100)
    parser.add_argument("--depth", type=int, default=12, help="max_depth of the forest")
    parser.add_argument("--features", type=int, default=20)
    parser.add_argument("--grown-trees", type=int, default=100,
                        help="trees of the fully grown forest (0: skip it)")
    parser.add_argument("--train-rows", type=int, default=20_000)
    parser.add_argument("--engines", default=",".join(ENGINES),
                        help="comma list of: " + ", ".join(ENGINES))
    parser.add_argument("--strategies", default="auto",
                        help="comma list of SQL shapes per engine; auto = the profile's choice")
    parser.add_argument("--quick", action="store_true",
                        help="small run (100k rows, 20 trees, grown forest of 5) in about a "
                             "minute; explicit options still win")
    parser.add_argument("--timeout", type=float, default=1800,
                        help="seconds one measurement may take before it counts as a stall")
    parser.add_argument("--pg-url", default=os.environ.get("TREE2SQL_PG_URL"),
                        help="PostgreSQL URL (default: $TREE2SQL_PG_URL)")
    parser.add_argument("--workdir", type=Path, default=Path(".benchmarks"),
                        help="cache of trained forests and default output place")
    parser.add_argument("--out", type=Path, help="JSON results (default WORKDIR/results.json)")
    parser.add_argument("--chart", type=Path, help="PNG chart (default WORKDIR/ratios.png)")
    args = parser.parse_args(argv)
    if args.quick:
        given = set(a.split("=")[0].lstrip("-").replace("-", "_") for a in (argv or sys.argv)
                    if a.startswith("--"))
        for key, value in QUICK.items():
            if key not in given:
                setattr(args, key, value)
    return args


def _child(queue: Any, engine: str, strategy: str | None, workload: Workload,
           workdir: Path, pg_url: str | None) -> None:
    from benchmarks.measure import measure

    try:
        queue.put(measure(engine, strategy, workload, workdir, pg_url))
    except Exception as exc:  # report any engine or compile failure as a result
        queue.put({"engine": engine, "error": f"{type(exc).__name__}: {exc}"[:500]})


def run_one(engine: str, strategy: str | None, workload: Workload, args: argparse.Namespace
            ) -> dict[str, Any]:
    context = multiprocessing.get_context("spawn")
    queue = context.Queue()
    child = context.Process(target=_child,
                            args=(queue, engine, strategy, workload, args.workdir, args.pg_url))
    started = time.perf_counter()
    child.start()
    try:
        result = queue.get(timeout=args.timeout)
    except Exception:  # queue.Empty: the engine did not finish in time
        result = {"engine": engine, "error": f"stalled: no result in {args.timeout:.0f} s"}
        child.kill()
    child.join()
    result.setdefault("strategy", strategy or "auto")
    result["wall_seconds"] = time.perf_counter() - started
    result["workload"] = workload.describe()
    return result


def _line(r: dict[str, Any]) -> str:
    if "error" in r:
        return f"  {r['engine']:<10} {r['strategy']:<12} ERROR {r['error']}"
    return (f"  {r['engine']:<10} {r['strategy']:<12} compile {r['compile_seconds']:6.2f}s "
            f"({r['nodes_per_second'] / 1e6:4.2f}M nodes/s) {r['statement_bytes'] / 1e6:6.2f}MB "
            f"plan {r['planning_seconds']:6.2f}s score {r['scoring_seconds']:7.2f}s "
            f"sklearn {r['library_seconds']:5.2f}s x{r['ratio_to_library']:6.1f} "
            f"roundtrip {r['roundtrip_seconds']:6.2f}s x{r['ratio_to_roundtrip']:5.2f} "
            f"peak {r['peak_rss_bytes'] / 2**30:4.1f}GiB")


def main(argv: list[str] | None = None) -> int:
    args = parse(argv)
    args.workdir.mkdir(parents=True, exist_ok=True)
    workloads = [Workload(args.rows, args.features, args.trees, args.depth, args.train_rows)]
    if args.grown_trees:
        workloads.append(Workload(args.rows, args.features, args.grown_trees, None,
                                  args.train_rows))
    engines = [e for e in args.engines.split(",") if e]
    strategies = [None if s == "auto" else s for s in args.strategies.split(",") if s]
    results = []
    for workload in workloads:
        clock = time.perf_counter()
        trained_forest(workload, args.workdir)
        print(f"{workload.label}, {workload.rows:,} rows "
              f"(forest ready in {time.perf_counter() - clock:.1f}s)", flush=True)
        for engine in engines:
            if engine == "postgres" and not args.pg_url:
                print("  postgres   skipped: no --pg-url / TREE2SQL_PG_URL", flush=True)
                continue
            for strategy in strategies:
                results.append(run_one(engine, strategy, workload, args))
                print(_line(results[-1]), flush=True)
    out = args.out or args.workdir / "results.json"
    report = {"machine": {"cpus": os.cpu_count(), "python": platform.python_version(),
                          "platform": platform.platform()},
              "results": results}
    out.write_text(json.dumps(report, indent=2), encoding="utf-8")
    print(f"results: {out}")
    chart = args.chart or args.workdir / "ratios.png"
    try:
        from benchmarks.chart import draw
    except ImportError:
        print("chart skipped: install the bench extra (pip install -e '.[bench]')")
    else:
        if draw(results, chart):
            print(f"chart: {chart}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
