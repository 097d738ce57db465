"""`tree2sql inspect` checked against scikit-learn's own view of the same trees, and its
SQL figures against sqlglot's parse of the same statements.

Datasets bundled with scikit-learn:
- iris: Fisher 1936, UCI ML repository;
- digits: UCI ML repository, optical recognition of handwritten digits (Alpaydin and
  Kaynak 1998), scikit-learn's 8x8 copy of its test set;
- diabetes: Efron, Hastie, Johnstone and Tibshirani 2004, "Least Angle Regression".
"""

from __future__ import annotations

import dataclasses
import json
import pickle
import struct
import sys
from itertools import product

import numpy as np
import pandas as pd
import pytest
import skops.io
import sqlglot
from click.testing import CliRunner
from conftest import need
from sklearn.datasets import load_diabetes, load_digits, load_iris
from sklearn.ensemble import RandomForestClassifier, RandomForestRegressor
from sklearn.tree import DecisionTreeClassifier
from sqlglot import exp

from tree2sql.cli import cli
from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.dialects import available, load_profile
from tree2sql.ingest import ingest
from tree2sql.inspect import LimitCheck, check_limits, inspect_forest
from tree2sql.sql_measure import measure_statement
from tree2sql.strategies import STRATEGIES

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2


def _iris():
    X, y = load_iris(return_X_y=True, as_frame=True)
    return RandomForestClassifier(n_estimators=6, max_depth=6, random_state=0).fit(X, y)


def _digits():
    X, y = load_digits(return_X_y=True, as_frame=True)
    return RandomForestClassifier(n_estimators=4, max_depth=5, random_state=0).fit(X, y), X


def _diabetes():
    X, y = load_diabetes(return_X_y=True, as_frame=True)
    return RandomForestRegressor(n_estimators=4, max_depth=4, random_state=0).fit(X, y)


@pytest.fixture(scope="module")
def iris_model():
    return _iris()


@pytest.fixture(scope="module")
def iris_report(iris_model):
    """Every dialect and strategy: the model is small enough to compile each for real."""
    return inspect_forest(ingest(iris_model))


@pytest.fixture(scope="module")
def iris_file(iris_model, tmp_path_factory):
    path = tmp_path_factory.mktemp("inspect") / "iris.skops"
    skops.io.dump(iris_model, path)
    return path


def _sklearn_split_counts(model) -> tuple[np.ndarray, np.ndarray]:
    """Split nodes and trees per feature from tree_.feature (leaves hold -2 there)."""
    splits = np.zeros(model.n_features_in_, dtype=int)
    trees = np.zeros(model.n_features_in_, dtype=int)
    for member in model.estimators_:
        feature = member.tree_.feature
        counts = np.bincount(feature[feature >= 0], minlength=model.n_features_in_)
        splits += counts
        trees += counts > 0
    return splits, trees


@pytest.mark.parametrize("make", ["iris", "digits", "diabetes"])
def test_tree_counts_match_scikit_learn(make):
    model = {"iris": _iris, "digits": lambda: _digits()[0], "diabetes": _diabetes}[make]()
    report = inspect_forest(ingest(model), dialects=["duckdb"])
    members = model.estimators_
    depths = [m.get_depth() for m in members]
    leaves = [m.get_n_leaves() for m in members]
    nodes = [m.tree_.node_count for m in members]
    assert report.n_trees == len(members)
    assert report.tree_depths == depths
    assert report.tree_leaves == leaves
    assert report.tree_nodes == nodes
    assert report.n_nodes == sum(nodes)
    assert report.n_leaves == sum(leaves)
    for spread, values in ((report.depth, depths), (report.leaves, leaves),
                           (report.nodes, nodes)):
        assert (spread.min, spread.median, spread.max) == \
            (np.min(values), np.median(values), np.max(values))


@pytest.mark.parametrize("make", ["iris", "digits", "diabetes"])
def test_feature_use_matches_scikit_learn(make):
    model = {"iris": _iris, "digits": lambda: _digits()[0], "diabetes": _diabetes}[make]()
    report = inspect_forest(ingest(model), dialects=["duckdb"])
    splits, trees = _sklearn_split_counts(model)
    assert [f.name for f in report.features] == list(model.feature_names_in_)
    assert [f.splits for f in report.features] == splits.tolist()
    assert [f.trees for f in report.features] == trees.tolist()
    assert report.unused_features == [str(n) for n, s in
                                      zip(model.feature_names_in_, splits, strict=True) if s == 0]


def test_constant_pixels_are_reported_unused():
    model, X = _digits()
    report = inspect_forest(ingest(model), dialects=["duckdb"])
    constant = [c for c in X.columns if X[c].nunique() == 1]  # digits: blank corner pixels
    assert constant, "digits has pixels that are blank in every image"
    assert set(constant) <= set(report.unused_features)


def test_task_classes_and_missing_values(iris_model, iris_report):
    assert iris_report.task == "classification"
    assert iris_report.classes == iris_model.classes_.tolist()
    try:  # does the library itself score a row of NaN?
        iris_model.predict(pd.DataFrame(np.full((1, iris_model.n_features_in_), np.nan),
                                        columns=iris_model.feature_names_in_))
        library_accepts = True
    except ValueError:
        library_accepts = False
    assert iris_report.accepts_missing is library_accepts
    regression = inspect_forest(ingest(_diabetes()), dialects=["duckdb"])
    assert regression.task == "regression" and regression.classes is None

    X, y = load_iris(return_X_y=True)
    names = load_iris().target_names[y]  # string labels, in the library's sorted order
    labelled = RandomForestClassifier(n_estimators=2, random_state=0).fit(X, names)
    report = inspect_forest(ingest(labelled), dialects=["duckdb"])
    assert report.classes == labelled.classes_.tolist() == ["setosa", "versicolor", "virginica"]


def test_every_dialect_and_strategy_is_reported(iris_report):
    pairs = {(s.dialect, s.strategy) for s in iris_report.shapes}
    assert pairs == set(product(available(), STRATEGIES))
    assert {p.dialect for p in iris_report.planner} == set(available())
    for shape in iris_report.shapes:
        assert shape.size_from == "compiled"
        assert shape.listed == (shape.strategy in load_profile(shape.dialect).strategies)
        if shape.renders:
            assert shape.statement_bytes > 0 and shape.case_depth >= 1
        else:
            assert shape.error
    for choice in iris_report.planner:
        if choice.strategy is not None:
            assert choice.strategy in load_profile(choice.dialect).strategies
            assert choice.reason


def test_compiled_sizes_are_the_compiled_statements(iris_model, iris_report):
    forest = ingest(iris_model)
    for shape in iris_report.shapes:
        if shape.dialect in ("duckdb", "tsql") and shape.renders:
            sql = compile_forest(forest, ScoringRequest(table="scored_rows",
                                                        strategy=shape.strategy),
                                 shape.dialect).sql
            assert shape.statement_bytes == len(sql.encode())


def _ast_figures(sql: str, dialect: str) -> tuple[int, int, int]:
    """CASE nesting, widest CASE and widest select list, from sqlglot's parse tree."""
    tree = sqlglot.parse_one(sql, read=dialect)
    deepest = 0
    for case in tree.find_all(exp.Case):
        depth, node = 1, case.parent
        while node is not None:
            depth += isinstance(node, exp.Case)
            node = node.parent
        deepest = max(deepest, depth)
    # Oracle's count: each WHEN ... THEN pair is two, plus the operand and the ELSE.
    widest = max((2 * len(c.args.get("ifs") or []) + (c.args.get("default") is not None)
                  + (c.this is not None) for c in tree.find_all(exp.Case)), default=0)
    columns = max(len(s.expressions) for s in tree.find_all(exp.Select))
    return deepest, widest, columns


@pytest.mark.parametrize("dialect", ["duckdb", "postgres", "tsql", "sqlite", "bigquery"])
@pytest.mark.parametrize("strategy", ["nested_case", "depth_staged"])
def test_figures_agree_with_sqlglot_parse(dialect, strategy):
    """Hostile names (keywords, brackets, quotes) must not fool the scanner."""
    X, y = load_iris(return_X_y=True)
    names = np.array(["CASE (when", "it's END)", 'quote " END'])[y]
    model = DecisionTreeClassifier(max_depth=5, random_state=0)
    frame = pd.DataFrame(X, columns=["CASE (", "END)", "a'b END", "[x] ( "])
    model.fit(frame, names)
    forest = ingest(model)
    profile = load_profile(dialect)
    if strategy not in profile.strategies:
        pytest.skip(f"{dialect} does not list {strategy}")
    sql = compile_forest(forest, ScoringRequest(table="t", strategy=strategy), dialect).sql
    figures = measure_statement(sql, profile)
    case_depth, widest_case, columns = _ast_figures(sql, profile.sqlglot_dialect)
    assert figures.case_depth == case_depth
    assert figures.case_arguments == widest_case
    assert figures.select_items == columns
    if strategy == "nested_case":
        assert figures.case_depth >= model.get_depth()  # one CASE level per tree level


def test_deepest_tree_figures_match_the_full_compile(iris_model, iris_report):
    """Above the size threshold, CASE figures come from the deepest tree alone: per-tree
    figures, so they must equal those of the whole statement."""
    estimated = inspect_forest(ingest(iris_model), measure_limit=0)
    compiled = {(s.dialect, s.strategy): s for s in iris_report.shapes}
    for shape in estimated.shapes:
        full = compiled[(shape.dialect, shape.strategy)]
        assert shape.size_from == "estimate"
        assert shape.renders == full.renders
        if full.renders:
            assert shape.statement_bytes > 0
            assert shape.figures_from == "deepest tree"
            assert shape.case_depth == full.case_depth
            assert shape.expression_depth is None and shape.select_items is None


def test_limits_crossed():
    """SQL Server nests CASE at most 10 levels (Microsoft docs, MSSQLSERVER_125); a fully
    grown digits tree is deeper, so one nested CASE per tree must be flagged there."""
    X, y = load_digits(return_X_y=True)
    model = DecisionTreeClassifier(random_state=0).fit(X, y)
    assert model.get_depth() > 10
    report = inspect_forest(ingest(model), dialects=["tsql"])
    nested = next(s for s in report.shapes if s.strategy == "nested_case")
    assert nested.case_depth >= model.get_depth()
    assert "case_depth" in nested.crosses
    choice = report.planner[0]
    assert choice.strategy != "nested_case"

    profile = dataclasses.replace(load_profile("duckdb"),
                                  limits={"case_depth": 3, "statement_bytes": 10**9,
                                          "limit_nobody_measures": 5})
    checks = {c.limit: c for c in check_limits(nested, profile)}
    assert checks["case_depth"] == LimitCheck("case_depth", 3, "case_depth",
                                              nested.case_depth, True)
    assert not checks["statement_bytes"].crossed
    assert checks["limit_nobody_measures"].measure is None
    assert not checks["limit_nobody_measures"].crossed


def test_cli_text(iris_file):
    result = CliRunner().invoke(cli, ["inspect", str(iris_file), "--dialect", "duckdb",
                                      "--dialect", "tsql"])
    assert result.exit_code == 0, result.output
    for text in ("petal width (cm)", "duckdb", "tsql", "nested_case", "planner"):
        assert text in result.stdout


def test_cli_json(iris_model, iris_file):
    result = CliRunner().invoke(cli, ["inspect", str(iris_file), "--json",
                                      "--dialect", "sqlite"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    splits, _ = _sklearn_split_counts(iris_model)
    assert data["n_trees"] == len(iris_model.estimators_)
    assert data["n_nodes"] == sum(m.tree_.node_count for m in iris_model.estimators_)
    assert data["depth"]["max"] == max(m.get_depth() for m in iris_model.estimators_)
    assert [f["splits"] for f in data["features"]] == splits.tolist()
    assert data["unused_features"] == []
    assert data["classes"] == iris_model.classes_.tolist()
    assert data["comparison"] == "float32(x) <= threshold"
    assert isinstance(data["accepts_missing"], bool)
    assert len(data["fingerprint"]) == 64 and int(data["fingerprint"], 16) >= 0
    assert {s["strategy"] for s in data["shapes"]} == set(STRATEGIES)
    for shape in data["shapes"]:
        assert {"statement_bytes", "size_from", "case_depth", "expression_depth",
                "limits", "crosses", "planner_estimate"} <= set(shape)
    assert data["planner"][0]["dialect"] == "sqlite"


def test_cli_plot_writes_png(iris_file, tmp_path):
    try:
        import matplotlib  # noqa: F401
        present = True
    except ImportError:
        present = False
    need(present, "matplotlib: pip install 'tree2sql[plot]'")
    png = tmp_path / "iris.png"
    result = CliRunner().invoke(cli, ["inspect", str(iris_file), "--plot", str(png),
                                      "--dialect", "duckdb"])
    assert result.exit_code == 0, result.output
    data = png.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    width, height = struct.unpack(">II", data[16:24])  # IHDR follows the signature
    assert width >= 800 and height >= 400
    assert len(data) > 20_000  # three drawn panels, not an empty canvas


def test_cli_plot_without_matplotlib(iris_file, tmp_path, monkeypatch):
    # A None entry in sys.modules makes `import matplotlib` raise ImportError (Python
    # language reference, "The import system", 5.3.1): the state of an install without it.
    monkeypatch.setitem(sys.modules, "matplotlib", None)
    png = tmp_path / "iris.png"
    result = CliRunner().invoke(cli, ["inspect", str(iris_file), "--plot", str(png)])
    assert result.exit_code == 2
    assert "pip install 'tree2sql[plot]'" in result.stderr
    assert not png.exists()


def test_cli_plot_needs_png_name(iris_file, tmp_path):
    result = CliRunner().invoke(cli, ["inspect", str(iris_file), "--plot",
                                      str(tmp_path / "chart.txt")])
    assert result.exit_code == 2


@pytest.mark.parametrize("content", [b"", b"not a model at all", b"PK\x03\x04broken zip"])
def test_cli_bad_file_exits_2(tmp_path, content):
    path = tmp_path / "model.skops"
    path.write_bytes(content)
    result = CliRunner().invoke(cli, ["inspect", str(path)])
    assert result.exit_code == 2
    assert "error:" in result.stderr


def test_cli_missing_file_and_unknown_dialect(iris_file, tmp_path):
    missing = CliRunner().invoke(cli, ["inspect", str(tmp_path / "absent.skops")])
    assert missing.exit_code == 2
    unknown = CliRunner().invoke(cli, ["inspect", str(iris_file), "--dialect", "nosuchdb"])
    assert unknown.exit_code == 2


def test_cli_pickle_needs_flag(iris_model, tmp_path):
    path = tmp_path / "iris.pkl"
    path.write_bytes(pickle.dumps(iris_model))
    refused = CliRunner().invoke(cli, ["inspect", str(path), "--dialect", "duckdb"])
    assert refused.exit_code == 2
    assert "--allow-pickle" in refused.stderr
    allowed = CliRunner().invoke(cli, ["inspect", str(path), "--allow-pickle",
                                       "--dialect", "duckdb"])
    assert allowed.exit_code == 0, allowed.output
