"""Render-only deploys (--dry-run --dialect) for warehouses the tests cannot reach.

The statements are parsed back with sqlglot, a parser this project did not write, in the
target's own dialect. Model: a small forest on the wine data set (Forina et al., UCI
Machine Learning Repository), as bundled with scikit-learn.
"""

from __future__ import annotations

import skops.io
import sqlglot
from click.testing import CliRunner
from sklearn.datasets import load_wine
from sklearn.ensemble import RandomForestClassifier

from tree2sql.cli import cli


def test_snowflake_function_renders_without_connecting(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)  # where a default DuckDB file would appear
    wine = load_wine(as_frame=True)
    model = RandomForestClassifier(n_estimators=3, max_depth=3, random_state=0)
    model.fit(wine.data, wine.target)
    path = tmp_path / "wine.skops"
    skops.io.dump(model, path)
    result = CliRunner().invoke(cli, [
        "deploy", str(path), "--source", "cellar.wines", "--key", "lot", "--as", "function",
        "--name", "cellar.wine_class", "--dry-run", "--dialect", "snowflake"])
    assert result.exit_code == 0, result.output
    create = next(s for s in result.stdout.split(";\n\n") if "CREATE OR REPLACE FUNCTION" in s)
    assert create.startswith("-- tree2sql") and "sha256:" in create.splitlines()[1]
    parsed = sqlglot.parse_one(create, read="snowflake")
    assert isinstance(parsed, sqlglot.exp.Create)
    assert parsed.args["kind"].upper() == "FUNCTION"
    assert create.count("__t2s_arg") >= 2 * wine.data.shape[1]  # declared and used
    assert not (tmp_path / "tree2sql.duckdb").exists()


def test_dialect_without_dry_run_is_refused(tmp_path):
    result = CliRunner().invoke(cli, [
        "deploy", str(tmp_path / "m.skops"), "--source", "t", "--key", "k", "--as", "view",
        "--name", "v", "--dialect", "snowflake"])
    assert result.exit_code == 2
    assert "--dry-run" in result.output


def test_spark_declares_arrays_for_a_table_but_not_for_a_view(tmp_path):
    """A deployed table reads the session variables declared just before it; a view, which
    Spark would refuse over session variables, gets the arrays inline (text_arrays)."""
    wine = load_wine(as_frame=True)
    model = RandomForestClassifier(n_estimators=3, max_depth=3, random_state=0)
    model.fit(wine.data, wine.target)
    path = tmp_path / "wine.skops"
    skops.io.dump(model, path)
    rendered = {}
    for form in ("table", "view"):
        result = CliRunner().invoke(cli, [
            "deploy", str(path), "--source", "cellar.wines", "--key", "lot", "--as", form,
            "--name", "cellar.wine_scores", "--dry-run", "--dialect", "spark"])
        assert result.exit_code == 0, result.output
        rendered[form] = result.stdout.split(";\n\n")
    table = rendered["table"]
    declares = [i for i, s in enumerate(table)  # not the manifest row that records them
                if "DECLARE OR REPLACE VARIABLE" in s and "tree2sql_deployments" not in s]
    create = next(i for i, s in enumerate(table) if "CREATE TABLE `cellar`.`wine_scores`" in s)
    assert len(declares) == 3 * 3 and max(declares) < create
    assert table[declares[0]].startswith("-- tree2sql")  # the first created statement
    assert not any("DECLARE" in s for s in rendered["view"])
    view = next(s for s in rendered["view"] if "CREATE OR REPLACE VIEW" in s)
    assert "strategy text_arrays" in view
