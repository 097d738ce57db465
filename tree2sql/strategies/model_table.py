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
from tree2sql.forest import LEAF, Forest
from tree2sql.strategies.base import Context, LeafValue, Needs, Strategy, literal_bytes

DOUBLE_MAX = float(np.finfo(np.float64).max)
INSERT_ROWS = 500  # rows per INSERT unless the profile says fewer (common practice)
STRUCTURE = ("tree", "node", "feature", "bound", "next_left", "next_right", "next_missing")


def value_columns(forest: Forest) -> int:
    """Values stored per node: every output for forests, one for per-output boosting trees."""
    return int(forest.trees[0].value.shape[1])


def model_table_name(forest: Forest) -> str:
    return f"__t2s_model_{forest.fingerprint()[:16]}"


def node_rows(forest: Forest, bounds: list[np.ndarray], profile: Profile) -> list[list[str]]:
    """One row of SQL literals per node, in tree then node order."""
    rows: list[list[str]] = []
    for t, tree in enumerate(forest.trees):
        leaf = tree.left == LEAF
        ids = np.arange(tree.n_nodes)
        bound = np.clip(bounds[t], -DOUBLE_MAX, DOUBLE_MAX)
        goes_left = tree.missing_left & forest.accepts_missing
        left = np.where(leaf, ids, tree.left)
        right = np.where(leaf, ids, tree.right)
        missing = np.where(leaf, ids, np.where(goes_left, left, right))
        feature = np.where(leaf, -1, tree.feature)
        for n in range(tree.n_nodes):
            b = 0.0 if leaf[n] else float(bound[n])
            rows.append([str(t), str(n), str(int(feature[n])), profile.double(b),
                         str(int(left[n])), str(int(right[n])), str(int(missing[n])),
                         *(profile.double(float(v)) for v in tree.value[n])])
    return rows


class ModelTable(Strategy):
    name = "model_table"
    summary = "trees as rows of a model table, walked by joins (huge models, short statements)"

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
        rows = node_rows(ctx.forest, ctx.bounds, p)
        batch = min(INSERT_ROWS, p.limit("insert_rows", INSERT_ROWS))
        quoted = ", ".join(p.quote(n) for n in names)
        for start in range(0, len(rows), batch):
            values = p.ddl["insert_row_separator"].join(
                p.ddl["insert_row"].format(values=", ".join(row))
                for row in rows[start:start + batch])
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
        for level in range(1, max(t.depth() for t in forest.trees) + 1):
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
        leaves = [int(n) for n in (tree.left == LEAF).nonzero()[0]]
        wanted = [leaf_value(n) for n in leaves]
        p, K = ctx.profile, value_columns(ctx.forest)
        values = [ctx.prefix(f"v{tree_index}_{k}") for k in range(K)]
        if wanted == [str(n) for n in leaves]:
            return ctx.prefix(f"n{tree_index}")
        for k in range(K):
            if wanted == [p.double(float(tree.value[n, k])) for n in leaves]:
                return values[k]
        for k in range(K):
            top = np.argmax(tree.value[leaves], axis=1)
            if wanted == ["1" if c == k else "0" for c in top.tolist()]:
                beats = [f"{values[k]} > {values[j]}" for j in range(k)] + \
                        [f"{values[k]} >= {values[j]}" for j in range(k + 1, K)]
                return f"CASE WHEN {' AND '.join(beats) or '1 = 1'} THEN 1 ELSE 0 END"
        branches = " ".join(f"WHEN {n} THEN {v}" for n, v in zip(leaves, wanted, strict=True))
        return f"CASE {ctx.prefix(f'n{tree_index}')} {branches} END"

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        depth = max(tree.depth() for tree in forest.trees)
        per_stage = 300 + 60 * forest.n_features + 40 * len(profile.quote("__t2s_f0"))
        pivot = len(forest.trees) * (forest.n_outputs + 1) * 80
        terms = len(forest.trees) * forest.n_outputs * (literal_bytes(profile) + 40)
        return Needs(per_stage * (depth + 3) + pivot + terms + 4000, case_depth=2,
                     expression_depth=12,
                     select_columns=len(forest.trees) * (forest.n_outputs + 1)
                     + forest.n_features + 4,
                     inline=False)
