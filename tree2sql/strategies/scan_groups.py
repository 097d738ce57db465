"""case_leaves with the trees split into groups, each group walked by a scan of its own and
the groups joined back on each row's physical identity (PostgreSQL tables).

Why (figures in benchmarks/README.md, PostgreSQL shapes): a row engine runs every tree's
CASE program for one row before the next row, and the programs of 100 deep trees no
longer fit the processor's caches, so each node visited costs about twice what it does
with 20 trees. Walking 20 trees over all rows, then the next 20, keeps one group's
program in cache; the joins cost less than the cache misses they save. Each group is
fenced by the profile's `stage_fence` (PostgreSQL: a WITH clause of its own), which
keeps its walks from being copied into the sums and still lets the planner hand the
scans, the joins and the sums to the parallel workers (a Gather above the joins). The
rows joined so far are fenced too, so each scan joins them in turn, in the statement's
order:

    SELECT * FROM (WITH fence AS (SELECT 1)
                   SELECT * FROM (WITH fence ... SELECT row..., keys, ok, leaf_0 ... leaf_19
                                  FROM checked) g0
                   JOIN (WITH fence ... SELECT row..., leaf_20 ... leaf_39 FROM checked) g1
                   USING (row...)) j1
    JOIN (WITH fence ... SELECT row..., leaf_40 ... FROM checked) g2 USING (row...) ...

The order matters for the hash joins' memory: PostgreSQL cannot see that the row
identity is unique through the fenced scans, so it estimates each join's rows as if it
multiplied them (five scans of 1M rows: 390 billion) and sizes a hash table's batches on
disk by that estimate. Free to reorder, it hashed one join's result for another, in
524,288 batches (ten scans of 1M rows: 16 GB of temporary files, stopped after 4
minutes); in this order every hash table holds one scan's rows, whose count it knows.

The join needs a key that is unique and never NULL in every row the statement reads,
whatever the user's keys are: the profile's `row_identity` (PostgreSQL: `tableoid, ctid`,
unique per row of a table, its partitions and inheritance children within one
statement's snapshot). A view has none, so the planner takes this shape only for a source
checked to be a stored table (`ScoringRequest.row_identity`), which deploy asks for only
for a table, the one form that always scores every row: a filter on a deployed view
reaches the table through the first scan alone, and the other scans walk every row; an
incremental insert scores few rows, which the planner joined in nested loops. The source
stage must be
read once per group, so the compiler writes it `cte_inlined` (NOT MATERIALIZED).

The joins hash every group's rows, which spill to temporary files past `work_mem`: about
1.5 KB per row scored (1M rows: 1.5 GB in 414 files; 522 MB when the joins ran in the
leader; case_leaves: 32 MB for its stored scores; measured on PostgreSQL 15 with the
default work_mem of 4 MB).

Profile keys: those of case_leaves, `row_identity` (expressions over the table) and
`cte_inlined`.
"""

from __future__ import annotations

import math

from tree2sql.dialects import Profile
from tree2sql.forest import Forest
from tree2sql.strategies.base import Context, Needs, require_keys
from tree2sql.strategies.case_leaves import REQUIRED_KEYS, CaseLeaves

TREES_PER_SCAN = 20  # 10, 15, 25 and 34 measured within run-to-run spread of it
SCAN_KEYS = (*REQUIRED_KEYS, "row_identity", "cte_inlined")


def scan_groups(n_trees: int) -> list[range]:
    """Consecutive groups of near-equal size, none larger than TREES_PER_SCAN."""
    count = max(1, math.ceil(n_trees / TREES_PER_SCAN))
    ends = [round(n_trees * (g + 1) / count) for g in range(count)]
    return [range(begin, end) for begin, end in zip([0, *ends[:-1]], ends, strict=True)]


class ScanGroups(CaseLeaves):
    name = "scan_groups"
    summary = ("case_leaves in groups of trees, each group walked by its own scan and the "
               "groups joined on the row's physical identity (tables of row engines)")
    reads_row_identity = True

    def stages(self, ctx: Context) -> list[tuple[str, str]]:
        require_keys(ctx.profile, SCAN_KEYS, self.name)
        walks, q = self.walks(ctx), ctx.profile.quote
        using = f" USING ({', '.join(ctx.identity)})"
        groups, fence = scan_groups(len(walks)), ctx.profile.stage_fence(ctx.prefix("fence"))
        rows: list[str] = []  # the rows joined so far, as a FROM item
        for g, trees in enumerate(groups):
            carried = [*ctx.identity, *([*ctx.keys, ctx.ok] if g == 0 else [])]
            scan = ["(\n", *self.walk_stage(ctx, carried, walks[trees.start:trees.stop]),
                    f"\n) AS {q(f'__t2s_scan{g}')}"]
            if not g:
                rows = scan
                continue
            joined = ["SELECT *\nFROM ", *rows, "\nJOIN ", *scan, using]
            if g == len(groups) - 1:
                return [(ctx.prefix("leaves"), "".join(joined))]
            rows = ["(\n", fence, *joined, f"\n) AS {q(f'__t2s_join{g}')}"]
        return [(ctx.prefix("leaves"), "".join(["SELECT *\nFROM ", *rows]))]  # one group

    def inlined_stages(self, ctx: Context) -> set[str]:
        return {ctx.source}

    def needs(self, forest: Forest, profile: Profile) -> Needs:
        require_keys(profile, SCAN_KEYS, self.name)
        needs = super().needs(forest, profile)
        if len(forest.trees) <= TREES_PER_SCAN:
            return Needs(needs.statement_bytes, unsuitable=(
                f"{len(forest.trees)} trees fit one scan ({TREES_PER_SCAN} per scan): "
                "case_leaves walks them without the join"))
        return needs
