"""case_leaves with the trees split into groups, each group walked by a scan of its own and
the groups joined back on each row's physical identity (PostgreSQL tables).

Why (figures in benchmarks/README.md, PostgreSQL shapes): a row engine runs every tree's
CASE program for one row before the next row, and the programs of 100 deep trees no
longer fit the processor's caches, so each node visited costs about twice what it does
with 20 trees. Walking 20 trees over all rows, then the next 20, keeps one group's
program in cache; each group's fenced scan runs in the parallel workers, and the joins
cost less than the cache misses they save:

    SELECT * FROM (SELECT row..., keys, ok, leaf_0 ... leaf_19 FROM checked OFFSET 0) g0
    JOIN (SELECT row..., leaf_20 ... leaf_39 FROM checked OFFSET 0) g1 USING (row...) ...

The join needs a key that is unique and never NULL in every row the statement reads,
whatever the user's keys are: the profile's `row_identity` (PostgreSQL: `tableoid, ctid`,
unique per row of a table, its partitions and inheritance children within one
statement's snapshot). A view has none, so the planner takes this shape only for a source
checked to be a stored table (`ScoringRequest.row_identity`); the source stage must be
read once per group, so the compiler writes it `cte_inlined` (NOT MATERIALIZED).

The joins sort (or hash) every group's rows, which spill to temporary files past
`work_mem`: about 0.5 KB per row scored (1M rows: 522 MB, against case_leaves' 32 MB for its
stored scores; measured on PostgreSQL 15 with the default work_mem of 4 MB).

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
        parts = ["SELECT *\nFROM "]
        for g, trees in enumerate(scan_groups(len(walks))):
            carried = [*ctx.identity, *([*ctx.keys, ctx.ok] if g == 0 else [])]
            parts += ["\nJOIN (\n" if g else "(\n",
                      *self.walk_stage(ctx, carried, walks[trees.start:trees.stop]),
                      f"\n) AS {q(f'__t2s_scan{g}')}", using if g else ""]
        return [(ctx.prefix("leaves"), "".join(parts))]

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
