"""Bad input through the real command line: exit code 2, a message naming the problem and
the fix, and never a traceback. Agreement exits 0 and writes the JSON report."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import joblib
import numpy as np
import pandas as pd
import pytest
import skops.io
from click.testing import CliRunner
from sklearn.datasets import load_iris
from sklearn.ensemble import RandomForestClassifier, RandomForestRegressor
from sklearn.linear_model import LogisticRegression

from tree2sql.cli import cli

FEATURES = ["sepal_length", "sepal_width", "petal_length", "petal_width"]


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> Path:
    """Model and data files, good and bad, built once for the module.

    Data: iris (R. A. Fisher 1936; UCI ML repository).
    """
    d = tmp_path_factory.mktemp("cli")
    X, y = load_iris(return_X_y=True, as_frame=True)
    X.columns = FEATURES
    model = RandomForestClassifier(n_estimators=4, random_state=0).fit(X, y)
    skops.io.dump(model, d / "model.skops")
    joblib.dump(model, d / "model.joblib")
    data = X.copy()
    data.insert(0, "id", range(len(data)))
    data.to_csv(d / "rows.csv", index=False)
    data.to_parquet(d / "rows.parquet")
    data.iloc[:0].to_csv(d / "header_only.csv", index=False)
    (d / "empty.csv").write_bytes(b"")
    data.drop(columns=["petal_width"]).to_csv(d / "missing_column.csv", index=False)
    text = data.copy()
    text["petal_width"] = "wide"
    text.to_csv(d / "text_column.csv", index=False)
    repeated = data.copy()
    repeated.loc[3, "id"] = 2
    repeated.to_csv(d / "repeated_key.csv", index=False)
    whole = (d / "model.skops").read_bytes()
    (d / "truncated.skops").write_bytes(whole[: len(whole) // 2])
    pickled = (d / "model.joblib").read_bytes()
    (d / "truncated.joblib").write_bytes(pickled[: len(pickled) // 2])
    (d / "noise.skops").write_bytes(bytes(range(256)) * 4)
    skops.io.dump(LogisticRegression(max_iter=1000).fit(X, y), d / "linear.skops")
    skops.io.dump(RandomForestClassifier(), d / "unfitted.skops")
    two_outputs = np.column_stack([y, y * 2.0])
    skops.io.dump(RandomForestRegressor(n_estimators=2, random_state=0).fit(X, two_outputs),
                  d / "two_outputs.skops")
    return d


def run(files: Path, *args: str):
    result = CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)
    text = result.output + (result.stderr if result.stderr_bytes is not None else "")
    assert "Traceback" not in text
    assert "internal error" not in text
    return result.exit_code, text


def bad(files: Path, *args: str) -> str:
    code, text = run(files, *args)
    assert code == 2, text
    assert "error:" in text and "fix:" in text
    return text


def test_verify_agrees_and_writes_report(files):
    report_path = files / "report.json"
    code, text = run(files, "verify", files / "model.skops", "--data", files / "rows.csv",
                     "--key", "id", "--report", report_path)
    assert code == 0, text
    assert "AGREE" in text
    report = json.loads(report_path.read_text())
    assert report["rows"] == 150
    assert report["disagreements"] == 0
    assert report["max_abs_diff"] <= 1e-12
    assert isinstance(report["ties"], int)
    assert report["null_scores"] == 0


def test_verify_parquet_without_key_numbers_rows(files):
    code, text = run(files, "verify", files / "model.skops", "--data",
                     files / "rows.parquet", "--strategy", "node_arrays")
    assert code == 0, text
    assert "150 rows checked, 0 disagreements" in text


def test_missing_column(files):
    text = bad(files, "verify", files / "model.skops", "--data",
               files / "missing_column.csv", "--key", "id")
    assert "petal_width" in text and "missing" in text


def test_text_column(files):
    text = bad(files, "verify", files / "model.skops", "--data", files / "text_column.csv",
               "--key", "id")
    assert "petal_width" in text and "VARCHAR" in text


def test_empty_file(files):
    assert "empty" in bad(files, "verify", files / "model.skops", "--data",
                          files / "empty.csv")


def test_header_only_csv(files):
    assert "no rows" in bad(files, "verify", files / "model.skops", "--data",
                            files / "header_only.csv", "--key", "id")


def test_repeated_key(files):
    text = bad(files, "verify", files / "model.skops", "--data", files / "repeated_key.csv",
               "--key", "id")
    assert "'id'" in text and "1 repeated keys" in text


def test_missing_key_column(files):
    assert "'shipment_id'" in bad(files, "verify", files / "model.skops", "--data",
                                  files / "rows.csv", "--key", "shipment_id")


def test_missing_data_file(files):
    assert "does not exist" in bad(files, "verify", files / "model.skops", "--data",
                                   files / "nowhere.csv")


@pytest.mark.parametrize("name, words", [
    ("truncated.skops", ["truncated.skops", "damaged or truncated"]),
    ("nowhere.skops", ["nowhere.skops", "does not exist"]),
    ("linear.skops", ["LogisticRegression", "RandomForestClassifier"]),
    ("unfitted.skops", ["RandomForestClassifier", "not been fitted"]),
    ("two_outputs.skops", ["RandomForestRegressor", "2 outputs"]),
])
def test_bad_model_files(files, name, words):
    text = bad(files, "compile", files / name, "--table", "rows")
    for word in words:
        assert word in text


def test_pickle_needs_allow_pickle(files):
    text = bad(files, "compile", files / "model.joblib", "--table", "rows")
    assert "skops" in text and "--allow-pickle" in text
    code, sql = run(files, "compile", files / "model.joblib", "--table", "rows",
                    "--allow-pickle")
    assert code == 0 and "SELECT" in sql


def test_noise_is_not_loaded_even_with_allow_pickle(files):
    bad(files, "compile", files / "noise.skops", "--table", "rows")
    text = bad(files, "compile", files / "noise.skops", "--table", "rows", "--allow-pickle")
    assert "noise.skops" in text


def test_truncated_pickle_with_allow_pickle(files):
    text = bad(files, "compile", files / "truncated.joblib", "--table", "rows",
               "--allow-pickle")
    assert "truncated.joblib" in text


def test_unknown_dialect(files):
    text = bad(files, "compile", files / "model.skops", "--table", "rows",
               "--dialect", "nosuchdb")
    assert "nosuchdb" in text and "duckdb" in text


def test_unknown_strategy_and_bad_column_map(files):
    assert "nosuchshape" in bad(files, "compile", files / "model.skops", "--table", "rows",
                                "--strategy", "nosuchshape")
    assert "petal" in bad(files, "compile", files / "model.skops", "--table", "rows",
                          "--column", "petal")
    assert "'petal'" in bad(files, "compile", files / "model.skops", "--table", "rows",
                            "--column", "petal=petal_width")


def test_majority_for_a_regressor_is_refused(files, tmp_path):
    X, y = load_iris(return_X_y=True)
    skops.io.dump(RandomForestRegressor(n_estimators=2, random_state=0).fit(X, y),
                  tmp_path / "regressor.skops")
    assert "majority" in bad(files, "compile", tmp_path / "regressor.skops", "--table",
                             "rows", "--combine", "majority")


def test_compile_writes_output_file(files, tmp_path):
    out = tmp_path / "score.sql"
    code, text = run(files, "compile", files / "model.skops", "--table", "rows", "--key",
                     "id", "-o", out)
    assert code == 0, text
    assert pd.Series(["score_prob_0", "score_class"]).map(out.read_text().__contains__).all()


@pytest.mark.parametrize("args", [
    ["verify", "{model}", "--data", "\x00"],
    ["verify", "{model}", "--data", "{rows}", "--report", "out\x00.json"],
    ["compile", "model\x00.skops", "--table", "rows"],
    ["compile", "{model}", "--table", "rows", "-o", "\x00"],
    ["inspect", "{model}", "--plot", "a\x00.png"],
    ["demo", "--workdir", "\x00"],
])
def test_nul_byte_in_a_path_is_a_usage_error(files, args):
    """POSIX file names cannot hold NUL (the OS answers ValueError, not OSError): exit 2."""
    args = [a.format(model=files / "model.skops", rows=files / "rows.csv") for a in args]
    code, text = run(files, *args)
    assert code == 2, text
    assert "NUL byte" in text


@pytest.mark.parametrize("command", [["verify", "{model}"], ["deploy", "{model}", "--source",
                                      "rows", "--as", "view", "--name", "v"], ["status"]])
@pytest.mark.parametrize("url", ["", "  "])
def test_blank_url_is_a_usage_error(files, command, url):
    """An empty --url is a mistake (an unset shell variable), not a request for the default."""
    args = [a.format(model=files / "model.skops") for a in command]
    code, text = run(files, *args, "--url", url)
    assert code == 2, text
    assert "not a database URL" in text


def test_python_dash_m_runs_the_same_command_line(files):
    """`python -m tree2sql` (no script on PATH) compiles, and a usage error exits 2 there
    too: the exit codes scripts rely on (click's convention for usage errors)."""
    ok = subprocess.run([sys.executable, "-m", "tree2sql", "compile",
                         str(files / "model.skops"), "--table", "t", "--key", "id"],
                        capture_output=True, text=True)
    assert ok.returncode == 0, ok.stderr
    assert "SELECT" in ok.stdout
    bad = subprocess.run([sys.executable, "-m", "tree2sql", "compile",
                          str(files / "model.skops"), "--dialect", "nosuch", "--table", "t"],
                         capture_output=True, text=True)
    assert bad.returncode == 2 and "Traceback" not in bad.stderr, bad.stderr
