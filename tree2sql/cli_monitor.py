"""The `monitor` command: drift and outcome figures of scored rows, computed in SQL."""

from __future__ import annotations

import sys

import click

from tree2sql.cli import EXIT_DISAGREE, _load, _parse_columns, cli, model_options
from tree2sql.cli_params import FILE, URL
from tree2sql.compiler import Combine
from tree2sql.errors import UserError
from tree2sql.monitor_report import ALERT_PSI, WARN_PSI

EXIT_ALERT = EXIT_DISAGREE  # 1: some PSI at or above the alert level


@click.command("monitor")
@model_options
@click.option("--reference-data", "reference_data", type=FILE, default=None,
              help="The training reference: training rows (CSV or Parquet, columns named "
                   "like the monitored table's) or a reference JSON saved earlier.")
@click.option("--save-reference", "save_reference", type=FILE, default=None,
              help="Write the training reference as JSON (then --table/--data are optional).")
@click.option("--name", default=None, metavar="NAME",
              help="With --url: a deployed name; its manifest row gives the reference "
                   "(deploy --reference-data), the source table, the keys and, unless it "
                   "is a function, the scores.")
@click.option("--table", default=None, metavar="TABLE",
              help="Table or view holding the rows to monitor (features, and the --label "
                   "column); schema.table allowed.")
@click.option("--data", default=None, type=FILE,
              help="Instead of --table and --url: rows to monitor from a CSV or Parquet "
                   "file, run in embedded DuckDB.")
@click.option("--scores", default=None, metavar="TABLE",
              help="Where the score columns are: a table or view (e.g. made by deploy --as "
                   "table) joined to --table on --key, or --table's own name when it holds "
                   "them. Default: the model's SQL scores --table inside the statement.")
@click.option("--label", default=None, metavar="COL",
              help="Column of --table with the observed outcome: adds accuracy, log loss, "
                   "confusion matrix and ROC AUC (MAE and RMSE for a regressor).")
@click.option("--url", default=None, type=URL,
              help="Run the statement in this database (SQLAlchemy URL, spark://local[2], "
                   "chdb://) and print the report.")
@click.option("--dialect", default=None, metavar="NAME",
              help="Without --url or --data: print the statement for this database "
                   "(sqlglot's name; default duckdb).")
@click.option("--report", "report_path", type=FILE, default=None,
              help="Also write the report as JSON.")
@click.option("--warn-psi", default=WARN_PSI, show_default=True, type=float,
              help="PSI from which a shift is reported as 'warn'.")
@click.option("--alert-psi", default=ALERT_PSI, show_default=True, type=float,
              help="PSI from which a shift is an alert (exit code 1).")
def monitor_cmd(model, allow_pickle, keys, columns, prefix, combine, strategy, reference_data,
                save_reference, name, table, data, scores, label, url, dialect, report_path,
                warn_psi, alert_psi):
    """Compare rows being scored with MODEL's training reference, in SQL.

    Per input column and for the score: the population stability index (PSI) against
    bins at the training deciles, the share of missing values and of values outside the
    training range. With --label: accuracy, log loss, confusion matrix and ROC AUC.
    Without --url or --data, prints the statement (for --dialect) to schedule yourself.

    \b
    PSI = sum over bins of (a - e) * ln(a / e), a and e today's and the training share
    of a bin, each at least 0.0001. Bins: x <= edge1, edge1 < x <= edge2, ...,
    x > last edge, and missing values as a bin of their own. Levels (common practice):
    below 0.1 stable, 0.1 to 0.25 warn, 0.25 and above alert.

    \b
    The score monitored: a binary model's probability of its second class, each
    class's probability for a multiclass model, a regressor's value. Text inputs of
    a pipeline: their missing share only. Multiclass ROC AUC: one-vs-rest per class
    and their mean. Log loss clips probabilities to [eps, 1 - eps] (scikit-learn).

    \b
    Exit codes: 0 no PSI at the alert level, 1 some PSI at or above it,
    2 bad input or usage.

    \b
    Examples:
      tree2sql monitor risk.skops --reference-data train.parquet \\
          --save-reference risk_reference.json
      tree2sql monitor risk.skops --reference-data risk_reference.json \\
          --url postgresql+psycopg://etl@db/wh --table shipments_today --label arrived_warm
      tree2sql monitor risk.skops --url duckdb:///tree2sql.duckdb --name shipment_scores
      tree2sql monitor risk.skops --reference-data risk_reference.json \\
          --table shipments --dialect snowflake > monitor.sql
    """
    from tree2sql.monitor import load_reference
    from tree2sql.monitor_report import run_monitor
    from tree2sql.monitor_sql import MonitorRequest, render_monitor

    if data is not None and (url or table or name):
        raise UserError("--data monitors a file in embedded DuckDB; it does not go with "
                        "--url, --table or --name", "drop --data, or drop the others")
    if dialect and (url or data is not None):
        raise UserError("--dialect renders without running; with --url or --data the "
                        "engine's own dialect is used", "drop --dialect")
    if name and not url:
        raise UserError("--name reads the deployment manifest, so it needs --url",
                        "add --url URL (the database deployed into)")
    if reference_data is None and name is None:
        raise UserError("monitoring needs the training reference",
                        "give --reference-data TRAIN.csv (or a saved REF.json), or --url "
                        "with --name of a deployment made with --reference-data")
    estimator, forest = _load(model, allow_pickle)
    mapping = _parse_columns(columns)
    engine = None
    try:
        reference = None
        if reference_data is not None:
            reference = load_reference(estimator, forest, reference_data, mapping,
                                       Combine(combine))
        if url:
            from tree2sql.engines import connect

            engine = connect(url)
        if name:
            deployment, stored = _deployed(engine, name)
            reference = reference or stored
            if reference is None:
                raise UserError(f"{name!r} was deployed without a monitoring reference",
                                "give --reference-data TRAIN.csv, or deploy again with "
                                "--reference-data")
            reference.check_model(forest)
            table = table or deployment.source
            keys = keys or tuple(deployment.keys)
            if scores is None and deployment.form != "function":
                scores = deployment.name
        if save_reference:
            save_reference.write_text(json_text(reference) + "\n", encoding="utf-8")
            click.echo(f"wrote {save_reference}", err=True)
            if not (table or data):
                return
        if data is not None:
            from tree2sql.sources import load_file

            engine, table = load_file(data)
        if not table:
            raise UserError("nothing to monitor", "name the rows with --table (or --data FILE)")
        request = MonitorRequest(table=table, columns=mapping, prefix=prefix, scores=scores,
                                 keys=tuple(keys), label=label, combine=Combine(combine),
                                 strategy=strategy)
        query = render_monitor(forest, reference, request,
                               engine.dialect if engine else dialect or "duckdb")
        if engine is None:
            click.echo(query.script + ";")
            return
        report = run_monitor(engine, query, warn_psi, alert_psi)
    finally:
        if engine is not None:
            engine.close()
    click.echo(report.to_text())
    if report_path:
        report_path.write_text(report.to_json() + "\n", encoding="utf-8")
        click.echo(f"wrote {report_path}", err=True)
    sys.exit(EXIT_ALERT if report.alerts else 0)


def _deployed(engine, name: str):
    """(deployment, its stored monitoring reference or None) from the manifest."""
    from tree2sql.dialects import load_profile
    from tree2sql.manifest import active, read
    from tree2sql.monitor import MonitorReference

    found = active(read(engine, load_profile(engine.dialect), name), name)
    if found is None:
        raise UserError(f"nothing named {name!r} is deployed here",
                        "run tree2sql status to list deployments")
    if found.reference is None:
        return found, None
    return found, MonitorReference.from_json(found.reference, f"the manifest row of {name!r}")


def json_text(reference) -> str:
    import json

    return json.dumps(reference.to_json(), indent=1)


cli.add_command(monitor_cmd)
