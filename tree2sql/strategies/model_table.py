"""The trees stored as rows of a table, walked by joins: for models too big to inline.

Statement size then grows with the number of trees, not nodes, so a forest of millions of
nodes, or an engine with a small statement limit (ClickHouse: 256 KiB), still fits. The
compiled query comes with setup statements that create the table `__t2s_model_<hash>`
(named by the model's fingerprint, so the scoring and leaf-id queries share it) and fill
it in batches. One row per node:

    tree, node, feature (-1 at leaves), bound, next_left, next_right, next_missing, value_k

Each input row is numbered and paired with every tree's root; each stage joins the model
table once and moves every (row, tree) pair one level down. Leaves send everything to
themselves, so pairs that arrived stay. The last stage turns the pairs back into one row
per input row with one column per tree and output, so the compiler can still sum the trees
in tree order (a SUM aggregate would add them in no defined order).
"""

from __future__ import annotations

import numpy as np

from tree2sql.dialects import Profile
from tree2sql.exact import integer_texts
from tree2sql.forest import LEAF, Forest
from tree2sql.strategies.base import (
    Context,
    LeafValue,
    Needs,
    Strategy,
    leaf_literals,
    literal_bytes,
)

DOUBLE_MAX = float(np.finfo(np.float64).max)
INSERT_ROWS = 500  # rows per INSERT unless the profile says fewer (common practice)
STRUCTURE = ("tree", "node", "feature", "bound", "next_left", "next_right", "next_missing")


def value_columns(forest: Forest) -> int:
    """Values stored per node: every output for forests, one for per-output boosting trees."""
    return int(forest.trees[0].value.shape[1])


def model_table_name(forest: Forest) -> str:
    return f"__t2s_model_{forest.fingerprint()[:16]}"


def node_rows(forest: Forest, bounds: list[np.ndarray], profile: Profile, row: str,
              values: list[np.ndarray]) -> list[str]:
    """One row per node in tree then node order, its SQL literals comma-separated and put
    in `row` (over {values}): every column written in bulk for the whole forest (one
    literal at a time, 500 fully grown trees took SQLite 180 s). `values`: the value
    columns' literals, already written (ModelTable._stored_literals)."""
    trees = forest.trees
    leaf = np.concatenate([tree.left == LEAF for tree in trees])
    ids = np.concatenate([np.arange(tree.n_nodes) for tree in trees])
    bound = np.where(leaf, 0.0, np.clip(np.concatenate(bounds), -DOUBLE_MAX, DOUBLE_MAX))
    goes_left = np.concatenate([tree.missing_left for tree in trees]) & forest.accepts_missing
    left = np.where(leaf, ids, np.concatenate([tree.left for tree in trees]))
    right = np.where(leaf, ids, np.concatenate([tree.right for tree in trees]))
    missing = np.where(leaf, ids, np.where(goes_left, left, right))
    feature = np.where(leaf, -1, np.concatenate([tree.feature for tree in trees]))
    tree_ids = np.repeat(np.arange(len(trees)), [tree.n_nodes for tree in trees])
    columns = [*(integer_texts(c).tolist() for c in (tree_ids, ids, feature)),
               profile.doubles(bound),
               *(integer_texts(c).tolist() for c in (left, right, missing)),
               *(column.tolist() for column in values)]
    before, after = row.split("{values}")
    return [f"{before}{', '.join(literals)}{after}" for literals in zip(*columns, strict=True)]


class ModelTable(Strategy):
    name = "model_table"
    summary = "trees as rows of a model table, walked by joins (huge models, short statements)"

    def __init__(self) -> None:
        self._stored: dict[int, np.ndarray] = {}  # see _stored_literals

    def _stored_literals(self, ctx: Context, k: int) -> np.ndarray:
        """Each node's literal in the stored column value_k, the trees laid end to end:
        made in one pass, for the table's rows and for tree_term to match a requested
        leaf value against."""
        if k not in self._stored:
            value = np.concatenate([tree.value[:, k] for tree in ctx.forest.trees])
            self._stored[k] = np.array(ctx.profile.doubles(value), dtype=object)
        return self._stored[k]

    def _table(self, ctx: Context) -> str:
        return ctx.profile.quote(model_table_name(ctx.forest))

    def _columns(self, ctx: Context) -> list[str]:
        return [*STRUCTURE, *(f"value_{k}" for k in range(value_columns(ctx.forest)))]

    def setup_statements(self, ctx: Context) -> list[str]:
        p, table = ctx.profile, self._table(ctx)
        names = self._columns(ctx)
        types = [p.integer_type] * 3 + [p.double_type] + [p.integer_type] * 3 \
            + [p.double_type] * value_columns(ctx.forest)
        columns = ", ".join(f"{p.quote(n)} {t}" for n, t in zip(names, types, strict=True))
        statements = [p.render_ddl("drop_table", name=table),
                      p.render_ddl("model_table", name=table, columns=columns)]
        rows = node_rows(ctx.forest, ctx.bounds, p, p.ddl["insert_row"],
                         [self._stored_literals(ctx, k) for k in range(value_columns(ctx.forest))])
        batch = min(INSERT_ROWS, p.limit("insert_rows", INSERT_ROWS))
        quoted = ", ".join(p.quote(n) for n in names)
        for start in range(0, len(rows), batch):
            values = p.ddl["insert_row_separator"].join(rows[start:start + batch])
            statements.append(p.render_ddl("insert", name=table, columns=quoted, rows=values))
        if "analyze_table" in p.ddl:  # join order depends on the new table's statistics
            statements.append(p.render_ddl("analyze_table", name=table))
        return statements

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        p, forest = ctx.profile, ctx.forest
        w, m = p.quote("w"), p.quote("m")
        col = {name: p.quote(name) for name in self._columns(ctx)}
        rid, tree, node = ctx.prefix("rid"), ctx.prefix("tree"), ctx.prefix("node")
        keys_ok = [*ctx.keys, ctx.ok]
        carried = [f"{w}.{c}" for c in [rid, *keys_ok, *ctx.features]]
        value = "CASE " + f"{m}.{col['feature']} " + " ".join(
            f"WHEN {i} THEN {w}.{f}" for i, f in enumerate(ctx.features)) + " END"
        x, bound = ctx.prefix("x"), ctx.prefix("bound")
        nexts = [ctx.prefix(f"next_{side}") for side in ("missing", "left", "right")]
        step = (f"CASE WHEN {x} IS NULL THEN {nexts[0]} WHEN {x} <= {bound} THEN {nexts[1]} "
                f"ELSE {nexts[2]} END")
        join = (f"JOIN {self._table(ctx)} {m} ON {m}.{col['tree']} = {w}.{tree} "
                f"AND {m}.{col['node']} = {w}.{node}")
        numbered = ctx.prefix("numbered")
        stages = [
            (numbered, f"SELECT {p.row_number} AS {rid}, "
                       + ", ".join([*keys_ok, *ctx.features]) + f"\nFROM {ctx.source}"),
            (ctx.prefix("walk0"),
             "SELECT " + ", ".join([*carried, f"{m}.{col['tree']} AS {tree}",
                                    f"{m}.{col['node']} AS {node}"])
             + f"\nFROM {numbered} {w} CROSS JOIN {self._table(ctx)} {m}"
             + f"\nWHERE {m}.{col['node']} = 0"),
        ]
        plain = [rid, *keys_ok, *ctx.features, tree]
        for level in range(1, forest.depth() + 1):
            # The feature value is picked in one stage and tested in the next, so it is
            # computed once per pair (engines may not share a repeated subexpression).
            looked_up = [f"{m}.{col['next_' + side]} AS {name}" for side, name
                         in zip(("missing", "left", "right"), nexts, strict=True)]
            stages.append((ctx.prefix(f"fetch{level}"),
                           "SELECT " + ", ".join([*carried, f"{w}.{tree}", *looked_up,
                                                  f"{m}.{col['bound']} AS {bound}",
                                                  f"{value} AS {x}"])
                           + f"\nFROM {stages[-1][0]} {w}\n{join}"))
            stages.append((ctx.prefix(f"walk{level}"),
                           "SELECT " + ", ".join([*plain, f"{step} AS {node}"])
                           + f"\nFROM {stages[-1][0]}"))
        values = [f"{m}.{col[f'value_{k}']} AS {ctx.prefix(f'value_{k}')}"
                  for k in range(value_columns(forest))]
        stages.append((ctx.prefix("leaves"),
                       "SELECT " + ", ".join([f"{w}.{c}" for c in [rid, *keys_ok]]
                                             + [f"{w}.{tree}", f"{w}.{node}", *values])
                       + f"\nFROM {stages[-1][0]} {w}\n{join}"))
        pivot = []
        for t in range(len(forest.trees)):
            pivot.append(f"MAX(CASE WHEN {tree} = {t} THEN {node} END) AS {ctx.prefix(f'n{t}')}")
            pivot += [f"MAX(CASE WHEN {tree} = {t} THEN {ctx.prefix(f'value_{k}')} END) "
                      f"AS {ctx.prefix(f'v{t}_{k}')}" for k in range(value_columns(forest))]
        stages.append((ctx.prefix("pivot"),
                       "SELECT " + ",\n  ".join([*keys_ok, *pivot])
                       + f"\nFROM {ctx.prefix('leaves')}\nGROUP BY "
                       + ", ".join([rid, *keys_ok])))
        return stages

    def tree_term(self, ctx: Context, tree_index: int, leaf_value: LeafValue) -> str:
        """The pivoted column that holds what `leaf_value` asks for.

        The table stores each leaf's values; a request for node ids, for one output's
        value, or for a vote for one class (the first largest value, as numpy's argmax)
        maps to those columns. Anything else falls back to a CASE over the leaf ids.
        """
        tree = ctx.forest.trees[tree_index]
        leaves = np.flatnonzero(tree.left == LEAF)
        wanted = leaf_literals(leaf_value, leaves)  # compared in bulk, literal by literal
        K = value_columns(ctx.forest)
        values = [ctx.prefix(f"v{tree_index}_{k}") for k in range(K)]
        if np.array_equal(wanted, integer_texts(leaves)):
            return ctx.prefix(f"n{tree_index}")
        first = int(ctx.forest.starts[tree_index])
        for k in range(K):
            if np.array_equal(wanted, self._stored_literals(ctx, k)[first + leaves]):
                return values[k]
        votes = np.array(["0", "1"], dtype=object)
        for k in range(K):
            top = np.argmax(tree.value[leaves], axis=1)
            if np.array_equal(wanted, votes[(top == k).astype(np.int64)]):
                beats = [f"{values[k]} > {values[j]}" for j in range(k)] + \
                        [f"{values[k]} >= {values[j]}" for j in range(k + 1, K)]
                return f"CASE WHEN {' AND '.join(beats) or '1 = 1'} THEN 1 ELSE 0 END"
        branches = " ".join(f"WHEN {n} THEN {v}" for n, v in zip(leaves.tolist(),
                                                                  wanted.tolist(), strict=True))
        return f"CASE {ctx.prefix(f'n{tree_index}')} {branches} END"

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        depth = forest.depth()
        per_stage = 300 + 60 * forest.n_features + 40 * len(profile.quote("__t2s_f0"))
        pivot = len(forest.trees) * (forest.n_outputs + 1) * 80
        terms = len(forest.trees) * forest.n_outputs * (literal_bytes(profile) + 40)
        return Needs(per_stage * (depth + 3) + pivot + terms + 4000, case_depth=2,
                     expression_depth=12,
                     select_columns=len(forest.trees) * (forest.n_outputs + 1)
                     + forest.n_features + 4,
                     inline=False)
