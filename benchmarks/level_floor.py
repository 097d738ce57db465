"""What one tree level costs DuckDB: `python -m benchmarks.level_floor [--rows N]`.

Compiles a forest with text_arrays, then replaces every level step with cheaper ones (no
gather, one gather, two chained gathers) and times each statement on the same rows, next to
scikit-learn's own time per tree level. It shows the floor under any level-by-level walk:
what a single list gather costs per row, against what the library spends on a whole level.
"""

from __future__ import annotations

import argparse
import re
import sys
import time
from pathlib import Path

if __package__ in (None, ""):  # run as `python benchmarks/level_floor.py`
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from benchmarks.backends import TABLE, DuckDBBackend  # noqa: E402
from benchmarks.measure import library_seconds  # noqa: E402
from benchmarks.workload import Workload, make_rows, trained_forest  # noqa: E402

STEP = re.compile(r'CASE WHEN "__t2s_xs"\["__t2s_slot(\d+)"\["__t2s_n\d+"\]\] <= '
                  r'"__t2s_bound\d+"\["__t2s_n\d+"\] THEN "__t2s_n\d+" \+ 1 '
                  r'ELSE "__t2s_right\d+"\["__t2s_n\d+"\] END')
VARIANTS = {
    "full step: 4 gathers + CASE (text_arrays)": None,
    "no gather: least(n + 1, cap)": 'least("__t2s_n{t}" + 1, 300)',
    "one gather: right[n]": '"__t2s_right{t}"["__t2s_n{t}"]',
    "two chained gathers: right[right[n]]": '"__t2s_right{t}"["__t2s_right{t}"["__t2s_n{t}"]]',
    "the row's value: xs[slot[n]] as an id": 'CAST("__t2s_xs"["__t2s_slot{t}"["__t2s_n{t}"]] '
                                             '> 0 AS BIGINT) + "__t2s_n{t}"',
    "CASE on the row's value, no right gather": 'CASE WHEN "__t2s_xs"["__t2s_slot{t}"'
                                                '["__t2s_n{t}"]] <= "__t2s_bound{t}"'
                                                '["__t2s_n{t}"] THEN "__t2s_n{t}" + 1 '
                                                'ELSE "__t2s_n{t}" + 2 END',
    "full step as arithmetic, no CASE": '"__t2s_n{t}" + 1 + ("__t2s_right{t}"["__t2s_n{t}"] '
                                        '- "__t2s_n{t}" - 1) * CAST(NOT ("__t2s_xs"['
                                        '"__t2s_slot{t}"["__t2s_n{t}"]] <= "__t2s_bound{t}"'
                                        '["__t2s_n{t}"]) AS BIGINT)',
}
START = re.compile(r'1 AS ("__t2s_n\d+")')


def main(argv: list[str] | None = None) -> int:
    from tree2sql.compiler import ScoringRequest, compile_forest
    from tree2sql.ingest import ingest

    parser = argparse.ArgumentParser(prog="python -m benchmarks.level_floor",
                                     description=__doc__)
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--trees", type=int, default=20)
    parser.add_argument("--workdir", type=Path, default=Path(".benchmarks"))
    args = parser.parse_args(argv)
    workload = Workload(rows=args.rows, trees=args.trees, max_depth=12, train_rows=5_000)
    model = trained_forest(workload, args.workdir)
    forest = ingest(model)
    X, _ = make_rows(args.rows, workload.features)
    backend = DuckDBBackend()
    backend.load(X, list(forest.feature_names))
    levels = max(tree.depth() for tree in forest.trees)
    visits = args.rows * args.trees * levels
    library = library_seconds(model, X, -1)
    print(f"{args.rows:,} rows, {args.trees} trees of depth {levels}; scikit-learn "
          f"{library:.2f} s = {library * 2 / visits * 1e9:.1f} ns per tree level and row "
          "(2 threads)")
    base = compile_forest(forest, ScoringRequest(TABLE, ("id",), strategy="text_arrays"),
                          "duckdb").sql
    for label, step in VARIANTS.items():
        sql = base if step is None else STEP.sub(lambda m, s=step: s.format(t=m.group(1)), base)
        if step is not None:  # start each row at its own node, so paths differ by row
            sql = START.sub(r'1 + "id" % 300 AS \1', sql)
        backend.drop("floor_scored")
        start = time.perf_counter()
        backend.execute(f"CREATE TABLE floor_scored AS {sql}")
        seconds = time.perf_counter() - start
        print(f"  {label:44s} {seconds:6.2f} s  {seconds * 2 / visits * 1e9:5.1f} ns per tree "
              "level and row (2 threads)", flush=True)
    backend.close()
    return 0


if __name__ == "__main__":
    sys.exit(main())
