"""Hostile input through the real command line: damaged and disguised model files, code
that a pickle would run, names built to break SQL quoting in every dialect, and tables
that do not fit the model. Each must end with exit code 2 (or 0 where the input is fine),
a message naming the problem and the fix, never a traceback.

Extends tests/test_cli_errors.py, tests/test_loading.py and tests/test_identifiers.py
(which cover one cut of a skops file, a Counter in a skops file and DuckDB-only names).
"""

from __future__ import annotations

import functools
import io
import json
import os
import sqlite3
import struct
import zipfile
import zlib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import skops.io
import sqlglot
from click.testing import CliRunner
from engine_rows import KEY
from engine_rows import load_rows as load_literal_rows
from sklearn.datasets import load_iris
from sklearn.ensemble import RandomForestClassifier
from sqlglot import exp

from tree2sql.cli import cli
from tree2sql.compiler import ScoringRequest, compile_forest
from tree2sql.dialects import available, load_profile
from tree2sql.engines import connect
from tree2sql.errors import UserError
from tree2sql.ingest import ingest
from tree2sql.loading import load_model
from tree2sql.verify import verify

FEATURES = ["sepal_length", "sepal_width", "petal_length", "petal_width"]
# Each breaks a quoting rule somewhere: MySQL/BigQuery/Spark backticks, T-SQL brackets,
# standard double quotes, string quotes, backslash escapes (MySQL, BigQuery), line and
# block comment starts, a comment end, unicode beyond the BMP, driver placeholders.
HOSTILE_NAMES = ["back`tick", "br]acket", "[open", 'dq"uote', "sq'uote", "back\\slash",
                 "new\nline", "dash--comment", "slash/*comment", "end*/", "ünï𝄞", "$1",
                 "?", "%s", "tab\there", "'); DROP TABLE t; --"]
HOSTILE_LABELS = ["l`1", "l]2", 'l"3', "l'4", "l\\5", "l\n6", "l--7", "l/*8", "ü𝄞9", "\\'",
                  "%(x)s"]
HOSTILE_TABLE, HOSTILE_KEY = "my'ta`ble", 'k"e]y'
# Fragments of the names above: a token holding one, other than the whole name, is a leak.
FRAGMENTS = ["`", '"', "'", "\\", "\n", "\t", "--", "/*", "*/", "ü", "𝄞", "%s", "%(", "$1",
             "[open", "br]", "DROP"]


def run(*args: object) -> tuple[int, str]:
    result = CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)
    text = result.output + (result.stderr if result.stderr_bytes is not None else "")
    assert "Traceback" not in text
    assert "internal error" not in text, text
    return result.exit_code, text


def bad(*args: object) -> str:
    code, text = run(*args)
    assert code == 2, text
    assert "error:" in text and "fix:" in text, text
    return text


@pytest.fixture(scope="module")
def iris(tmp_path_factory):
    """iris: R. A. Fisher (1936), Annals of Eugenics 7(2); UCI ML repository."""
    d = tmp_path_factory.mktemp("hostile")
    X, y = load_iris(return_X_y=True, as_frame=True)
    X.columns = FEATURES
    model = RandomForestClassifier(n_estimators=4, max_depth=5, random_state=0).fit(X, y)
    skops.io.dump(model, d / "model.skops")
    data = X.copy()
    data.insert(0, "id", range(len(data)))
    return d, model, data


# --- model files -------------------------------------------------------------------------

def _png() -> bytes:
    """A 1x1 PNG (PNG specification, W3C / ISO 15948): signature, IHDR, IDAT, IEND."""
    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(
            ">I", zlib.crc32(kind + body))
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", 1, 1, 8, 2, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(b"\x00\xff\x00\x00")) + chunk(b"IEND", b""))


def _zip(entries: dict[str, bytes]) -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, body in entries.items():
            archive.writestr(name, body)
    return buffer.getvalue()


def _wrong_files(iris_dir: Path) -> dict[str, bytes]:
    with zipfile.ZipFile(iris_dir / "model.skops") as archive:  # the real file, retargeted
        entries = {n: archive.read(n) for n in archive.namelist()}
    schema = json.loads(entries["schema.json"])
    schema.update({"__module__": "os", "__class__": "system"})
    return {
        "picture.skops": _png(),
        "rows.skops": (iris_dir / "rows.csv").read_bytes(),
        "empty_zip.skops": _zip({}),
        "junk_zip.skops": _zip({"schema.json": b"\x00\xffnot json", "a.npy": os.urandom(64)}),
        "not_schema.skops": _zip({"readme.txt": b"hello"}),
        "os_system.skops": _zip({**entries, "schema.json": json.dumps(schema).encode()}),
        "half_schema.skops": _zip({"schema.json": entries["schema.json"][:200]}),
        "json_list.skops": _zip({"schema.json": b"[1, 2, 3]"}),
        "text.joblib": b"just some text, not a pickle\n",
        "nul.pkl": b"\x00" * 64,
    }


@pytest.mark.parametrize("allow", [False, True])
def test_truncated_skops_at_many_points(iris, allow):
    d, _, _ = iris
    whole = (d / "model.skops").read_bytes()
    flag = ["--allow-pickle"] if allow else []
    for cut in (1, 3, 4, 10, 30, 200, len(whole) // 3, len(whole) // 2, len(whole) - 22,
                len(whole) - 1):
        path = d / f"cut_{cut}.skops"
        path.write_bytes(whole[:cut])
        text = bad("compile", path, "--table", "rows", *flag)
        assert path.name in text


@pytest.mark.parametrize("allow", [False, True])
def test_files_of_the_wrong_kind(iris, allow):
    d, _, data = iris
    data.to_csv(d / "rows.csv", index=False)
    flag = ["--allow-pickle"] if allow else []
    for name, body in _wrong_files(d).items():
        (d / name).write_bytes(body)
        text = bad("compile", d / name, "--table", "rows", *flag)
        assert name in text, text
    assert "os.system" in bad("compile", d / "os_system.skops", "--table", "rows")


class _Marker:
    """Unpickling this opens (creates) the marker file: code run by merely loading."""

    def __init__(self, path: Path) -> None:
        self.path = path

    def __reduce__(self):
        return (open, (str(self.path), "w"))


@pytest.mark.parametrize("suffix", [".pkl", ".joblib", ".skops", ".bin"])
def test_a_pickle_that_runs_code_is_refused(tmp_path, suffix):
    import pickle

    marker = tmp_path / "ran.txt"
    evil = tmp_path / f"model{suffix}"
    evil.write_bytes(pickle.dumps(_Marker(marker)))
    text = bad("compile", evil, "--table", "rows")
    assert "--allow-pickle" in text and "skops" in text
    bad("verify", evil, "--data", evil)
    with pytest.raises(UserError):
        load_model(evil)
    assert not marker.exists()
    # With the user's explicit consent the file is loaded, runs, and is still refused.
    text = bad("compile", evil, "--table", "rows", "--allow-pickle")
    assert marker.exists()  # proof the crafted file does run code when trusted
    assert "cannot compile" in text or "TextIOWrapper" in text


def test_skops_holding_a_function_names_it(iris, tmp_path):
    _, model, _ = iris
    import copy

    hooked = copy.deepcopy(model)
    hooked.hook_ = os.system  # skops stores the function by name; loading would import it
    skops.io.dump(hooked, tmp_path / "hooked.skops")
    text = bad("compile", tmp_path / "hooked.skops", "--table", "rows")
    assert "system" in text and "does not load" in text


# --- names that try to break quoting -----------------------------------------------------

@functools.cache
def hostile_model(names=tuple(HOSTILE_NAMES), labels=tuple(HOSTILE_LABELS)):
    rng = np.random.default_rng(0)
    X = rng.normal(size=(500, len(names)))
    y = np.array(labels, dtype=object)[np.argmax(X[:, :len(labels)], axis=1) % len(labels)]
    model = RandomForestClassifier(n_estimators=4, max_depth=5, random_state=0)
    return model.fit(pd.DataFrame(X, columns=list(names)), y), X


def _strategies():
    return [(d, s) for d in available() for s in load_profile(d).strategies]


@pytest.mark.parametrize("dialect, strategy", _strategies())
def test_hostile_names_parse_back_as_single_tokens(dialect, strategy):
    """sqlglot (an independent parser) reads every hostile name back as one identifier and
    every label as one string literal, with the exact text; nothing else carries them."""
    model, _ = hostile_model()
    forest = ingest(model)
    compiled = compile_forest(forest, ScoringRequest(table=HOSTILE_TABLE, keys=(HOSTILE_KEY,),
                                                     strategy=strategy), dialect)
    statements = sqlglot.parse(compiled.script, read=load_profile(dialect).sqlglot_dialect)
    assert len(statements) == len(compiled.setup) + 1
    query = statements[-1]
    assert isinstance(query, exp.Select), type(query)
    assert not list(query.find_all(exp.Drop, exp.Command))
    identifiers = [i.this for s in statements for i in s.find_all(exp.Identifier)]
    literals = [lit.this for s in statements for lit in s.find_all(exp.Literal) if lit.is_string]
    for name in [*HOSTILE_NAMES, HOSTILE_TABLE, HOSTILE_KEY, *compiled.output_columns]:
        assert name in identifiers, (dialect, name)
    for label in HOSTILE_LABELS:
        assert label in literals, (dialect, label)
    expected = {*HOSTILE_NAMES, HOSTILE_TABLE, HOSTILE_KEY, *compiled.output_columns,
                *HOSTILE_LABELS, *forest.feature_names}
    # No fragment of a hostile name leaked into any other token.
    stray = [t for t in identifiers + literals
             if any(f in t for f in FRAGMENTS) and t not in expected]
    assert not stray, (dialect, stray)


def test_nul_in_a_name_is_refused(tmp_path):
    """SQLite's driver refuses a statement holding NUL and PostgreSQL ends the statement
    there, so NUL is refused when compiling, for every dialect."""
    for names, labels in ((("ok", "x\x00y"), ("a", "b")), (("ok", "fine"), ("a", "b\x00c"))):
        model, _ = hostile_model(names, labels)
        skops.io.dump(model, tmp_path / "nul.skops")
        for dialect in available():
            text = bad("compile", tmp_path / "nul.skops", "--table", "rows", "--dialect",
                       dialect)
            assert "NUL" in text


def _hostile_bench(name: str, tmp_path: Path, pg_url: str | None):
    if name == "duckdb":
        return connect(None)
    if name == "sqlite":
        return connect(f"sqlite:///{tmp_path / 'hostile.db'}")
    return connect(pg_url)


@pytest.mark.parametrize("engine_name", ["duckdb", "sqlite", "postgres"])
def test_hostile_names_run_and_agree(engine_name, tmp_path, request):
    """The same names executed for real: the rows load, the SQL runs, the model agrees."""
    pg_url = request.getfixturevalue("pg_url") if engine_name == "postgres" else None
    model, X = hostile_model()
    forest = ingest(model)
    engine = _hostile_bench(engine_name, tmp_path, pg_url)
    profile = load_profile(engine.dialect)
    table = f"t2s_hostile_{os.getpid()}_{HOSTILE_TABLE}"
    try:
        load_literal_rows(engine, profile, table, X, forest.feature_names)
        for strategy in profile.strategies[:2]:
            report = verify(model, forest, engine,
                            ScoringRequest(table=table, keys=(KEY,), strategy=strategy))
            assert report.rows == len(X) and report.disagreements == 0, report.to_text()
    finally:
        engine.execute(profile.render_ddl("drop_table", name=profile.quote(table)))
        engine.close()


# --- tables that do not fit the model ----------------------------------------------------

def _sqlite_table(path: Path, data: pd.DataFrame, types: dict[str, str] | None = None) -> str:
    types = types or {}
    with sqlite3.connect(path) as con:
        columns = ", ".join(f'"{c}" {types.get(c, "REAL")}' for c in data.columns)
        con.execute(f"CREATE TABLE rows ({columns})")
        con.executemany(f"INSERT INTO rows VALUES ({', '.join('?' * len(data.columns))})",
                        data.itertuples(index=False))
    return f"sqlite:///{path}"


def test_schema_mismatches_on_sqlite(iris, tmp_path):
    d, _, data = iris
    model = d / "model.skops"
    url = _sqlite_table(tmp_path / "missing.db", data.drop(columns=["petal_length"]))
    text = bad("verify", model, "--url", url, "--table", "rows", "--key", "id")
    assert "'petal_length' is missing" in text and "--column" in text
    texts = data.astype({"petal_width": str}).assign(petal_width=lambda f: "w" + f.petal_width)
    url = _sqlite_table(tmp_path / "text.db", texts, {"petal_width": "TEXT"})
    text = bad("verify", model, "--url", url, "--table", "rows", "--key", "id")
    assert "'petal_width' is TEXT" in text and "cast" in text
    url = _sqlite_table(tmp_path / "nokey.db", data)
    assert "'row_key'" in bad("verify", model, "--url", url, "--table", "rows",
                              "--key", "row_key")
    extra = data.assign(notes=1.5, Sepal_Colour=2.0)
    url = _sqlite_table(tmp_path / "extra.db", extra)
    code, text = run("verify", model, "--url", url, "--table", "rows", "--key", "id")
    assert code == 0 and "AGREE" in text, text
    integers = data.assign(petal_width=(data.petal_width * 10).astype(int))
    url = _sqlite_table(tmp_path / "ints.db", integers, {"petal_width": "INTEGER"})
    code, text = run("verify", model, "--url", url, "--table", "rows", "--key", "id")
    assert code == 0, text  # integer columns are numbers: cast to double once, then scored


def test_columns_equal_after_case_folding_on_postgres(iris, pg_url):
    """PostgreSQL keeps "petal_width" and "PETAL_WIDTH" apart; which one a name means then
    depends on quoting, so the check refuses the table and names both."""
    d, _, data = iris
    engine = connect(pg_url)
    table = f"t2s_fold_{os.getpid()}"
    p = load_profile("postgres")
    try:
        engine.execute(p.render_ddl("drop_table", name=p.quote(table)))
        columns = ", ".join(f"{p.quote(c)} DOUBLE PRECISION" for c in data.columns)
        engine.execute(f'CREATE TABLE {p.quote(table)} ({columns}, "PETAL_WIDTH" '
                       f"DOUBLE PRECISION, {p.quote('when')} DATE)")
        engine.execute(f"INSERT INTO {p.quote(table)} VALUES (1, 5.1, 3.5, 1.4, 0.2, 0.2, "
                       "DATE '2024-02-29')")
        text = bad("verify", d / "model.skops", "--url", pg_url, "--table", table,
                   "--key", "id")
        assert "'petal_width'" in text and "'PETAL_WIDTH'" in text and "rename" in text
        text = bad("verify", d / "model.skops", "--url", pg_url, "--table", table, "--key",
                   "id", "--column", "petal_width=when")
        assert "'when' is DATE" in text
    finally:
        engine.execute(p.render_ddl("drop_table", name=p.quote(table)))
        engine.close()


def test_duplicate_header_after_case_folding_in_a_csv(iris, tmp_path):
    """DuckDB's CSV reader renames a repeated header; whatever it does, the outcome is clean."""
    _, _, data = iris
    path = tmp_path / "folded.csv"
    data.assign(PETAL_WIDTH=data.petal_width + 100).to_csv(path, index=False)
    code, text = run("verify", iris[0] / "model.skops", "--data", path, "--key", "id")
    assert code in (0, 2), text
    if code == 2:
        assert "fix:" in text

