"""The `tree2sql` command line: parse, call the library, print. Exit codes scripts can trust:

0  success (and, for verify, every row agrees)
1  verify found disagreements
2  bad input or usage (the message names the problem and the fix)
3  internal error (a bug in tree2sql: please report it)
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import click

from tree2sql import __version__
from tree2sql.cli_params import FILE, FOLDER, URL
from tree2sql.compiler import CAUTION, Combine, ScoringRequest, compile_forest
from tree2sql.errors import UserError
from tree2sql.progress import progress

EXIT_DISAGREE, EXIT_USAGE, EXIT_INTERNAL = 1, 2, 3


class Tree2SqlGroup(click.Group):
    """Turns UserError into exit 2 and unexpected errors into exit 3, never a traceback."""

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except UserError as exc:
            click.echo(f"error: {exc.problem}", err=True)
            if exc.fix:
                click.echo(f"  fix: {exc.fix}", err=True)
            ctx.exit(EXIT_USAGE)
        except (click.exceptions.Exit, click.ClickException, click.Abort):
            raise
        except Exception as exc:
            if os.environ.get("TREE2SQL_DEBUG"):
                raise
            click.echo(f"internal error: {type(exc).__name__}: {exc}", err=True)
            click.echo("  this is a bug in tree2sql; rerun with TREE2SQL_DEBUG=1 for a traceback "
                       "and report it", err=True)
            ctx.exit(EXIT_INTERNAL)


@click.group(cls=Tree2SqlGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="tree2sql")
def cli() -> None:
    """Compile trained tree ensembles into SQL, prove the SQL agrees with the model, and
    score rows where they live.

    \b
    Typical session:
      tree2sql demo                                    # the cold-chain example, end to end
      tree2sql compile model.skops --table shipments --key shipment_id > score.sql
      tree2sql verify  model.skops --data sample.parquet --key shipment_id

    Exit codes: 0 success, 1 disagreements found, 2 bad input or usage, 3 internal error.
    """


def model_options(f):
    """Options shared by every command that reads a model and compiles it."""
    options = [
        click.argument("model", type=FILE),
        click.option("--allow-pickle", is_flag=True,
                     help="Load a pickle/joblib model file. Such files can run code when "
                          "loaded: use only for files you trust (skops files need no flag)."),
        click.option("--key", "keys", multiple=True, metavar="COL",
                     help="Key column passed through to the output; repeat for a compound "
                          "key. Example: --key shipment_id"),
        click.option("--column", "columns", multiple=True, metavar="FEATURE=COLUMN",
                     help="Read model feature FEATURE from table column COLUMN (default: the "
                          "column named like the feature). Models trained without feature "
                          "names call them x0, x1, ... Example: --column x0=transit_hours"),
        click.option("--prefix", default="score_", show_default=True,
                     help="Prefix of the output columns: <prefix>prob_<class> per class and "
                          "<prefix>class, or <prefix>value for a regressor."),
        click.option("--combine", type=click.Choice([c.value for c in Combine]),
                     default=Combine.AVERAGE.value, show_default=True,
                     help="average: mean of the trees' probabilities (scikit-learn's rule). "
                          "majority: each tree votes its top class, ties to the first class."),
        click.option("--strategy", default=None, metavar="NAME",
                     help="Force a SQL shape instead of the planner's choice "
                          "(see `tree2sql strategies`)."),
    ]
    for option in reversed(options):
        f = option(f)
    return f


def _parse_columns(pairs: tuple[str, ...]) -> dict[str, str]:
    mapping = {}
    for pair in pairs:
        feature, sep, column = pair.partition("=")
        if not sep or not feature or not column:
            raise UserError(f"--column {pair!r} is not FEATURE=COLUMN",
                            "write it like --column transit_hours=hours_in_transit")
        mapping[feature] = column
    return mapping


def _load(model: Path, allow_pickle: bool):
    from tree2sql.ingest import ingest
    from tree2sql.loading import load_model

    estimator = load_model(model, allow_pickle=allow_pickle)
    return estimator, ingest(estimator)


def _request(table: str, keys, columns, prefix, combine, strategy,
             reasons: int = 0) -> ScoringRequest:
    return ScoringRequest(table=table, keys=tuple(keys), columns=_parse_columns(columns),
                          prefix=prefix, combine=Combine(combine), strategy=strategy,
                          reasons=reasons)


reasons_option = click.option(
    "--reasons", type=click.IntRange(min=0), default=0, metavar="K",
    help="Also return, per row, the K features that contributed most to the score: "
         "<prefix>reason_<i> (feature name) and <prefix>reason_<i>_contribution (signed), "
         "i = 1..K. Contributions come from the decision paths (each split's change in "
         "node value, credited to its feature, averaged over the trees) and add up, with "
         "the model's average root value, to the explained output: a regressor's value, "
         "a binary classifier's probability of its second class, a multiclass model's "
         "probability of the predicted class. Ranked by absolute contribution; equal ones "
         "in the model's feature order. Forests and decision trees only. Default 0: none.")


@cli.command("compile")
@model_options
@click.option("--dialect", default="duckdb", show_default=True,
              help="Target database, by sqlglot's dialect name (duckdb, postgres, sqlite, ...).")
@click.option("--table", required=True, metavar="NAME",
              help="Table or view holding the rows to score; schema.table allowed.")
@click.option("--output", "-o", type=FILE,
              help="Write the SQL to this file instead of standard output.")
@reasons_option
def compile_cmd(model, allow_pickle, keys, columns, prefix, combine, strategy, dialect, table,
                output, reasons):
    """Compile MODEL into one SELECT statement that scores TABLE.

    The statement returns the key columns, one probability column per class (in the
    model's class order) and the predicted class; or the keys and the predicted value for
    a regressor. The chosen SQL shape and the reason go to stderr; stdout stays pure SQL.

    \b
    Example:
      tree2sql compile risk.skops --dialect postgres --table shipments \\
          --key shipment_id -o score_shipments.sql
    """
    _, forest = _load(model, allow_pickle)
    request = _request(table, keys, columns, prefix, combine, strategy, reasons)
    started = time.perf_counter()
    with progress("compiling trees", len(forest.trees)) as advance:
        compiled = compile_forest(forest, request, dialect, advance)
    seconds = time.perf_counter() - started
    click.echo(f"strategy: {compiled.reason}", err=True)
    click.echo(f"compiled {forest.n_nodes} nodes in {seconds:.2f} s, "
               f"{len(compiled.sql.encode())} bytes", err=True)
    if output:
        output.write_text(compiled.script + "\n", encoding="utf-8")
        click.echo(f"wrote {output}", err=True)
    else:
        click.echo(compiled.script)


@cli.command("verify")
@model_options
@click.option("--data", default=None, type=FILE,
              help="Rows to check: a CSV or Parquet file, or a DuckDB file with --table.")
@click.option("--url", default=None, type=URL,
              help="Instead of --data: check rows where they live, in this database "
                   "(SQLAlchemy URL), with --table or --deployed.")
@click.option("--table", default=None, metavar="NAME",
              help="The table to read when --data is a DuckDB database file; with --url, "
                   "the table whose rows are scored.")
@click.option("--deployed", default=None, metavar="NAME",
              help="With --url: check this deployed view/table/function itself and record "
                   "the result in the manifest.")
@click.option("--sample", default=None, type=click.IntRange(min=1), metavar="N",
              help="With --url: check N random rows instead of all.")
@click.option("--report", "report_path", type=FILE,
              help="Also write the report as JSON (rows, disagreements, max_abs_diff, ties, "
                   "null_scores, ...).")
@reasons_option
def verify_cmd(model, allow_pickle, keys, columns, prefix, combine, strategy, data, url, table,
               deployed, sample, report_path, reasons):
    """Prove the compiled SQL agrees with MODEL on the rows in --data, row for row.

    Loads the rows into embedded DuckDB, runs the compiled SQL there, predicts the same
    rows with the model itself and compares by key. Without --key, rows are numbered.
    Exit code 0 when every row agrees, 1 when any disagrees.

    \b
    Example:
      tree2sql verify risk.skops --data holdout.parquet --key shipment_id \\
          --report verify.json
    """
    from tree2sql.sources import ROW_KEY, load_file
    from tree2sql.verify import verify

    if (data is None) == (url is None) or (data and (deployed or sample)):
        raise UserError("give exactly one of --data (a file) or --url (a database); "
                        "--deployed and --sample go with --url",
                        "e.g. --data holdout.parquet, or --url URL --table T --sample 1000")
    if url and reasons:
        raise UserError("--reasons is checked on rows from --data for now, not with --url",
                        "verify the reason codes with --data FILE, or drop --reasons")
    if url:
        report = verify_live(model, allow_pickle, keys, columns, prefix, combine, strategy,
                             url, table, deployed, sample)
    else:
        estimator, forest = _load(model, allow_pickle)
        engine, loaded = load_file(data, table, add_row_key=not keys)
        request = _request(loaded, keys or (ROW_KEY,), columns, prefix, combine, strategy,
                           reasons)
        rows = int(engine.query(f'SELECT COUNT(*) AS n FROM "{loaded}"')["n"][0])
        with progress("verifying rows", rows) as advance:
            report = verify(estimator, forest, engine, request, advance)
    click.echo(report.to_text())
    if report_path:
        report_path.write_text(report.to_json() + "\n", encoding="utf-8")
        click.echo(f"wrote {report_path}", err=True)
    sys.exit(0 if report.agrees else EXIT_DISAGREE)


@cli.command("demo")
@click.option("--rows", default=1_000_000, show_default=True,
              help="Shipments to generate and score in place.")
@click.option("--workdir", default="tree2sql-demo", show_default=True,
              type=FOLDER,
              help="Folder for the demo's DuckDB file, model and SQL.")
def demo_cmd(rows, workdir):
    """Run the cold-chain example end to end on embedded DuckDB.

    Generates refrigerated shipments (fixed seed), trains a random forest for the risk of
    arriving out of temperature range, compiles it, verifies it row for row, scores every
    shipment in place and prints the riskiest ones with the timings.
    """
    from tree2sql.demo import run_demo

    ok = run_demo(rows=rows, workdir=workdir, echo=click.echo)
    click.echo(f"\nCaution: {CAUTION}")
    sys.exit(0 if ok else EXIT_DISAGREE)


@cli.command("strategies")
def strategies_cmd():
    """List the SQL shapes the planner can choose from."""
    from tree2sql.strategies import STRATEGIES

    for name, cls in sorted(STRATEGIES.items()):
        click.echo(f"{name:16} {cls.summary}")


from tree2sql.cli_inspect import inspect_cmd  # noqa: E402  (kept beside its registration)

cli.add_command(inspect_cmd)

from tree2sql.cli_deploy import deploy_cmd, restore_cmd, status_cmd, verify_live  # noqa: E402

cli.add_command(deploy_cmd)
cli.add_command(status_cmd)
cli.add_command(restore_cmd)
import tree2sql.cli_monitor  # noqa: E402, F401  (registers `monitor` on import)


def main() -> None:
    cli()
