"""Verify in the target database: sample rows there, score them there, compare in Python.

The sample lives in a temporary table (gone when the session ends, never in the user's
schema). Scores come either from freshly compiled SQL or from a deployed object, so the
check covers what is actually live; the comparison is tree2sql.verify's, unchanged.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from dataclasses import replace
from typing import Any

from tree2sql.compiler import Combine, CompiledQuery, ScoringRequest
from tree2sql.dialects import Profile, load_profile
from tree2sql.engines import Engine
from tree2sql.errors import UserError
from tree2sql.forest import Forest
from tree2sql.manifest import Deployment
from tree2sql.schema import with_row_identity
from tree2sql.verify import Report, verify

SAMPLE_TABLE = "t2s_verify_sample"


@contextlib.contextmanager
def sample_of(engine: Engine, source: str, keys: list[str], rows: int | None,
              scored_in: str | None = None) -> Iterator[tuple[str, int]]:
    """A temporary table of up to `rows` random rows of `source` (all rows when None).

    With `scored_in`, only rows whose keys that table or view holds are drawn (a table or
    incremental target may lag behind its source). Yields (table name, row count).
    """
    p = load_profile(engine.dialect)
    src, tgt = p.quote("__t2s_src"), p.quote("__t2s_tgt")
    where = ""
    if scored_in:
        match = " AND ".join(f"{tgt}.{p.quote(k)} = {src}.{p.quote(k)}" for k in keys)
        where = f"\nWHERE EXISTS (SELECT 1 FROM {p.qualified(scored_in)} {tgt} WHERE {match})"
    limit = "" if rows is None else f"\nORDER BY RANDOM() LIMIT {int(rows)}"
    engine.execute(f"CREATE TEMPORARY TABLE {p.quote(SAMPLE_TABLE)} AS\n"
                   f"SELECT {src}.* FROM {p.qualified(source)} {src}{where}{limit}")
    try:
        count = engine.query(f"SELECT COUNT(*) AS n FROM {p.quote(SAMPLE_TABLE)}")["n"][0]
        yield SAMPLE_TABLE, int(count)
    finally:
        with contextlib.suppress(Exception):  # an aborted transaction drops it anyway
            engine.execute(f"DROP TABLE {p.quote(SAMPLE_TABLE)}")


def verify_compiled(estimator: Any, forest: Forest, engine: Engine, request: ScoringRequest,
                    rows: int | None, progress: Callable[[int], None] | None = None) -> Report:
    """Compile for the engine's dialect and check it on a sample of `request.table`."""
    with sample_of(engine, request.table, list(request.keys), rows) as (table, count):
        if count == 0:
            raise UserError(f"table {request.table!r} has no rows to verify",
                            "load rows into it first")
        # The shape the source itself would get (a view: no row identity), not the sample's.
        request = with_row_identity(engine, request)
        return verify(estimator, forest, engine, replace(request, table=table), progress)


def verify_deployment(estimator: Any, forest: Forest, engine: Engine, deployment: Deployment,
                      rows: int | None,
                      progress: Callable[[int], None] | None = None) -> Report | None:
    """Check the deployed object itself on a sample; None when there is no row to check."""
    if deployment.fingerprint != forest.fingerprint():
        raise UserError(f"{deployment.name!r} version {deployment.version} runs the model "
                        f"with fingerprint {deployment.fingerprint[:16]}..., not this one "
                        f"({forest.fingerprint()[:16]}...)",
                        "verify with the model file that was deployed (see tree2sql status)")
    p = load_profile(engine.dialect)
    request = ScoringRequest(
        table=SAMPLE_TABLE, keys=tuple(deployment.keys),
        columns=dict(zip(forest.input_names, deployment.source_columns, strict=True)),
        combine=Combine(deployment.combine), strategy=deployment.strategy)
    scored_in = None if deployment.form == "function" else deployment.name
    with sample_of(engine, deployment.source, deployment.keys, rows, scored_in) as (table,
                                                                                   count):
        if count == 0:
            return None
        compiled = deployed_query(p, forest, deployment, table)
        return verify(estimator, forest, engine, request, progress, compiled=compiled)


def deployed_query(profile: Profile, forest: Forest, deployment: Deployment,
                   sample: str) -> CompiledQuery:
    """The deployed object's scores for the sampled keys, shaped like a compiled query."""
    from tree2sql.sql_functions import call_query

    keys, outputs = deployment.keys, deployment.output_columns
    scores = outputs[len(keys):]
    label = scores.pop() if forest.is_classifier else None
    if deployment.form == "function":
        sql = call_query(profile, deployment.name, sample, keys, deployment.source_columns,
                         outputs[len(keys):])
    else:
        q, d, s = profile.quote, profile.quote("__t2s_dep"), profile.quote("__t2s_smp")
        match = " AND ".join(f"{s}.{q(k)} = {d}.{q(k)}" for k in keys)
        sql = (f"SELECT {d}.* FROM {profile.qualified(deployment.name)} {d}\n"
               f"WHERE EXISTS (SELECT 1 FROM {q(sample)} {s} WHERE {match})")
    return CompiledQuery(sql, profile.name, deployment.strategy,
                         f"deployed {deployment.form} version {deployment.version}",
                         outputs, scores, label, deployment.source_columns)


def summary(report: Report | None, rows: int | None) -> dict[str, Any]:
    """What the manifest keeps of a report."""
    if report is None:
        return {"rows": 0, "agrees": None, "note": "no rows to check yet", "sample": rows}
    return {"rows": report.rows, "agrees": report.agrees,
            "disagreements": report.disagreements, "max_abs_diff": report.max_abs_diff,
            "ties": report.ties, "null_scores": report.null_scores, "sample": rows}
