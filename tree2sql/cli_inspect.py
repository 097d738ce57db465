"""`tree2sql inspect`: the model's shape and what each SQL shape would cost, before compiling."""

from __future__ import annotations

from pathlib import Path

import click

from tree2sql.cli_params import FILE


@click.command("inspect")
@click.argument("model", type=FILE)
@click.option("--allow-pickle", is_flag=True,
              help="Load a pickle/joblib model file. Such files can run code when loaded: "
                   "use only for files you trust (skops files need no flag).")
@click.option("--json", "as_json", is_flag=True,
              help="Print the report as JSON (trees, features, shapes, planner) instead of text.")
@click.option("--plot", type=FILE, metavar="FILE.png",
              help="Also draw tree depth and leaf distributions and feature usage into a PNG "
                   "(needs: pip install 'tree2sql[plot]').")
@click.option("--dialect", "dialects", multiple=True, metavar="NAME",
              help="Report only this dialect (repeat for several; default: every profile). "
                   "Example: --dialect tsql --dialect postgres")
@click.option("--exact-sizes", is_flag=True,
              help="Compile every dialect and strategy for real, however large the model, "
                   "instead of using the strategies' size estimates for large models.")
def inspect_cmd(model: Path, allow_pickle: bool, as_json: bool, plot: Path | None,
                dialects: tuple[str, ...], exact_sizes: bool) -> None:
    """Report on MODEL: trees, depth and leaf distribution, nodes, features used and how
    often; and per dialect and strategy the statement size, CASE nesting, the engine limits
    it would cross and the shape the planner would choose.

    \b
    Example:
      tree2sql inspect risk.skops
      tree2sql inspect risk.skops --json > risk-inspect.json
      tree2sql inspect risk.skops --plot risk.png
    """
    from tree2sql.ingest import ingest
    from tree2sql.inspect import MEASURE_LIMIT, inspect_forest
    from tree2sql.loading import load_model

    if plot:
        from tree2sql.inspect_plot import check_plot_target

        check_plot_target(plot)
    forest = ingest(load_model(model, allow_pickle=allow_pickle))
    report = inspect_forest(forest, dialects or None,
                            measure_limit=None if exact_sizes else MEASURE_LIMIT)
    click.echo(report.to_json() if as_json else report.to_text())
    if plot:
        from tree2sql.inspect_plot import plot_inspection

        plot_inspection(report, plot)
        click.echo(f"wrote {plot}", err=True)
