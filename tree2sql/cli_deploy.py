"""The `deploy`, `status` and `restore` commands, and `verify --url` (live verification)."""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

import click

from tree2sql.cli import EXIT_DISAGREE, _load, _request, model_options
from tree2sql.cli_params import FILE, URL
from tree2sql.compiler import CAUTION
from tree2sql.deploy import DEFAULT_DATABASE, DEFAULT_SAMPLE, Form
from tree2sql.errors import UserError
from tree2sql.progress import progress

URL_HELP = (f"SQLAlchemy URL of the target database, e.g. postgresql+psycopg://user@host/db "
            f"or sqlite:///scores.db (default: the DuckDB file {DEFAULT_DATABASE} here).")
CAUTIONS = ("Before scheduling: review the deployed SQL (tree2sql status --sql NAME), verify "
            "on a sample of fresh rows (tree2sql verify MODEL --url URL --deployed NAME), "
            "and keep your model-risk practice. " + CAUTION)


def _url(url: str | None) -> str:
    return url or f"duckdb:///{DEFAULT_DATABASE}"


def _connect(url: str | None, wait_seconds: float = 0.0):
    from tree2sql.engines import connect

    return connect(_url(url), wait_seconds=wait_seconds)


@click.command("deploy")
@model_options
@click.option("--url", default=None, type=URL, help=URL_HELP)
@click.option("--source", required=True, metavar="TABLE",
              help="Table or view holding the rows to score; schema.table allowed.")
@click.option("--as", "form", required=True, type=click.Choice([f.value for f in Form]),
              help="view: scores computed on read. table: scores of all rows, stored. "
                   "incremental: a table that each run extends with the keys not yet "
                   "scored (a new model starts it afresh). function: a SQL function of the feature "
                   "values.")
@click.option("--name", required=True, metavar="NAME",
              help="Name of the view, table or function to create; schema.name allowed.")
@click.option("--sample", default=DEFAULT_SAMPLE, show_default=True, metavar="N",
              help="Rows checked against the model before the deploy commits (0: none).")
@click.option("--dry-run", is_flag=True,
              help="Print the statements the deploy would run and change nothing.")
@click.option("--dialect", default=None, metavar="NAME",
              help="With --dry-run and no --url: render for this database without "
                   "connecting (e.g. snowflake, bigquery), as if nothing were deployed.")
@click.option("--reference-data", "reference_data", default=None, type=FILE,
              help="Training rows (CSV/Parquet, columns named like --source's) or a saved "
                   "reference JSON: the training reference `tree2sql monitor --name NAME` "
                   "compares with, kept in the manifest row.")
def deploy_cmd(model, allow_pickle, keys, columns, prefix, combine, strategy, url, source,
               form, name, sample, dry_run, dialect, reference_data):
    """Deploy MODEL's SQL into the database as a view, table, incremental table or function.

    Everything happens in one transaction: the source is checked against the model, the
    object and its manifest row (table tree2sql_deployments) are written, the live object
    is checked against the model on --sample rows, and only then committed. A failure or
    a disagreement leaves the database as it was. Exit code 1 on a disagreement.

    \b
    Examples:
      tree2sql deploy risk.skops --url postgresql+psycopg://etl@db/wh \\
          --source shipments --key shipment_id --as view --name shipment_risk
      tree2sql deploy risk.skops --source shipments --key shipment_id \\
          --as incremental --name shipment_scores     # run again on a schedule
    """
    from tree2sql.deploy import DeployRequest, Disagreement, deploy, plan

    if dialect and (url or not dry_run):
        raise UserError("--dialect renders without connecting, so it needs --dry-run "
                        "and no --url", "drop --dialect, or add --dry-run and drop --url")
    estimator, forest = _load(model, allow_pickle)
    scoring = _request(source, keys, columns, prefix, combine, strategy)
    reference = None
    if reference_data is not None:
        from tree2sql.monitor import load_reference

        reference = load_reference(estimator, forest, reference_data, dict(scoring.columns),
                                   scoring.combine).to_json()
    request = DeployRequest(name=name, form=Form(form), scoring=scoring, sample=sample,
                            reference=reference)
    if dry_run:
        engine = None if dialect else _connect(url)
        try:
            result = plan(engine, forest, request, dialect)
        finally:
            if engine is not None:
                engine.close()
        click.echo(";\n\n".join(result.statements) + ";")
        after = (f"then verify {sample} sampled rows and record the result in the manifest"
                 if sample else "no verification (--sample 0)")
        click.echo(f"-- dry run: {len(result.statements)} statements, nothing was changed; "
                   f"{after}", err=True)
        return
    engine = _connect(url, wait_seconds=600)
    try:
        with progress("verifying sample", sample or 1) as advance:
            result, report = deploy(engine, estimator, forest, request, advance)
    except Disagreement as exc:
        click.echo(exc.report.to_text())
        click.echo(f"rolled back: the deployed {form} disagrees with the model on "
                   f"{exc.report.disagreements} of {exc.report.rows} sampled rows; "
                   "nothing was changed", err=True)
        sys.exit(EXIT_DISAGREE)
    finally:
        engine.close()
    d = result.deployment
    if result.rerun:
        click.echo(f"ran incremental {d.name} (version {d.version}, unchanged): added "
                   f"{result.added} rows for keys of {d.source} not yet scored")
    else:
        replaced = f", replacing version {result.previous.version}" if result.previous else ""
        click.echo(f"deployed {d.form} {d.name} version {d.version}{replaced}")
        if result.added is not None:
            click.echo(f"  scored {result.added} rows into {d.name}")
    click.echo(f"  model {d.model}, fingerprint sha256:{d.fingerprint}")
    click.echo(f"  dialect {d.dialect}, strategy {d.strategy}, "
               f"{len(result.statements)} statements in one transaction")
    if report is None:
        click.echo("  live check: skipped" if not sample
                   else "  live check: no rows to check yet")
    else:
        click.echo("  live check on a sample: " + report.to_text().replace("\n", "\n  "))
    click.echo(f"\nCaution: {CAUTIONS}")


@click.command("status")
@click.option("--url", default=None, type=URL, help=URL_HELP)
@click.option("--all", "history", is_flag=True, help="Every version, not only the active ones.")
@click.option("--sql", "sql_name", default=None, metavar="NAME",
              help="Print the statements that created NAME's active version.")
@click.option("--json", "as_json", is_flag=True, help="Print the manifest rows as JSON.")
def status_cmd(url, history, sql_name, as_json):
    """List what tree2sql has deployed into the database, from its manifest.

    One line per deployment: name, form, version, model fingerprint, dialect, strategy,
    creation time and the last live check.
    """
    from dataclasses import asdict

    from tree2sql.dialects import load_profile
    from tree2sql.manifest import read

    engine = _connect(url)
    try:
        rows = read(engine, load_profile(engine.dialect))
    finally:
        engine.close()
    if sql_name is not None:
        found = [d for d in rows if d.name == sql_name and d.active]
        if not found:
            raise UserError(f"nothing named {sql_name!r} is deployed here",
                            "run tree2sql status to list deployments")
        click.echo(";\n\n".join(found[0].statements) + ";")
        return
    shown = rows if history else [d for d in rows if d.active]
    if as_json:
        click.echo(json.dumps([asdict(d) for d in shown], indent=2))
        return
    if not shown:
        click.echo(f"nothing deployed in {_url(url)}")
        return
    header = ("name", "form", "version", "fingerprint", "dialect", "strategy", "created",
              "last check")
    lines = [header] + [(d.name, d.form, str(d.version) + ("" if d.active else " (old)"),
                         d.fingerprint[:12], d.dialect, d.strategy, d.created_at,
                         _check_text(d.verification, d.verified_at)) for d in shown]
    widths = [max(len(line[i]) for line in lines) for i in range(len(header))]
    for line in lines:
        click.echo("  ".join(cell.ljust(w) for cell, w in zip(line, widths, strict=True))
                   .rstrip())


def _check_text(verification: dict[str, Any] | None, at: str | None) -> str:
    if not verification:
        return "never"
    if verification.get("agrees") is None:
        return f"no rows ({at})"
    verdict = "agree" if verification["agrees"] else "DISAGREE"
    return (f"{verdict} {verification['rows']} rows, "
            f"{verification.get('disagreements', 0)} disagreements ({at})")


@click.command("restore")
@click.option("--url", default=None, type=URL, help=URL_HELP)
@click.option("--name", required=True, metavar="NAME", help="The deployed name to restore.")
@click.option("--version", "version", default=None, type=int, metavar="N",
              help="Restore this version instead of the one before the active version.")
def restore_cmd(url, name, version):
    """Bring back the previous version of NAME (one transaction; the manifest records it).

    Re-runs the statements that created the earlier version, so a table is rebuilt with
    the earlier model's scores. Run `tree2sql verify OLD_MODEL --url URL --deployed NAME`
    afterwards to check it on current rows.
    """
    from tree2sql.deploy import restore

    engine = _connect(url, wait_seconds=600)
    try:
        restored, replaced = restore(engine, name, version)
    finally:
        engine.close()
    click.echo(f"restored {restored.form} {name} version {restored.version} "
               f"(fingerprint sha256:{restored.fingerprint}) in place of version "
               f"{replaced.version}")
    click.echo(f"\nCaution: {CAUTIONS}")


def verify_live(model: Path, allow_pickle: bool, keys, columns, prefix, combine, strategy,
                url: str, table: str | None, deployed: str | None, sample: int | None):
    """`verify --url`: score rows in the target database and compare with the model.

    With --deployed NAME the deployed object itself is checked (and the result recorded
    in the manifest); otherwise freshly compiled SQL runs over --table.
    """
    from tree2sql.deploy import record_check
    from tree2sql.dialects import load_profile
    from tree2sql.live_verify import verify_compiled, verify_deployment
    from tree2sql.manifest import active, read

    if bool(table) == bool(deployed):
        raise UserError("--url needs exactly one of --table (rows to score with freshly "
                        "compiled SQL) or --deployed (a deployed name to check)",
                        "add --table TABLE or --deployed NAME")
    estimator, forest = _load(model, allow_pickle)
    engine = _connect(url)
    try:
        if table:
            if not keys:
                raise UserError("verifying in the database needs key columns",
                                "name them with --key")
            request = _request(table, keys, columns, prefix, combine, strategy)
            with progress("verifying rows", sample or 1) as advance:
                return verify_compiled(estimator, forest, engine, request, sample, advance)
        found = active(read(engine, load_profile(engine.dialect), deployed), deployed)
        if found is None:
            raise UserError(f"nothing named {deployed!r} is deployed here",
                            "run tree2sql status to list deployments")
        with progress("verifying rows", sample or 1) as advance:
            report = verify_deployment(estimator, forest, engine, found, sample, advance)
        if report is None:
            raise UserError(f"{deployed!r} holds no rows to verify yet",
                            "run the deploy (or load rows into its source) first")
        record_check(engine, found, report, sample)
        return report
    finally:
        engine.close()
