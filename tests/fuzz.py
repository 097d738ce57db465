"""Fuzzers for the model loader and the command line, driven by hypothesis.

    python -m tests.fuzz --seconds 60          # from the repository root

Loader: mutated bytes of valid skops and pickle files (truncations, flipped and inserted
bytes, edited zip entries) go to `load_model(path, allow_pickle=False)` and then to
`ingest`: the only acceptable outcomes are an estimator/forest or a UserError.
Command line: random argv for compile, verify and inspect, built from option pools with
hostile values: exit code 0, 1 or 2, never a traceback or an "internal error".
"""

from __future__ import annotations

import argparse
import io
import random
import sys
import tempfile
import time
import zipfile
from collections import Counter
from collections.abc import Callable
from pathlib import Path

import joblib
import numpy as np
import skops.io
from hypothesis import HealthCheck, given, seed, settings
from hypothesis import strategies as st
from sklearn.ensemble import RandomForestClassifier

from tree2sql.errors import UserError

BATCH = 10  # examples per hypothesis run; runs repeat until the time budget is spent


def seed_files(folder: Path) -> dict[str, bytes]:
    """Valid model files (skops and joblib) and a data file the fuzzers start from."""
    rng = np.random.default_rng(0)
    X = rng.normal(size=(120, 3))
    y = np.where(X[:, 0] > 0, "warm", "cold")
    model = RandomForestClassifier(n_estimators=2, max_depth=3, random_state=0).fit(X, y)
    buffer = io.BytesIO()
    joblib.dump(model, buffer)
    rows = "x0,x1,x2\n" + "\n".join(",".join(f"{v:.3f}" for v in row) for row in X[:20])
    files = {"model.skops": skops.io.dumps(model), "model.joblib": buffer.getvalue(),
             "rows.csv": rows.encode()}
    for name, body in files.items():
        (folder / name).write_bytes(body)
    return files


def _edit_zip_entry(body: bytes, entry: int, cut: int, junk: bytes) -> bytes:
    """The zip with one entry's bytes cut short and junk appended: reaches skops' parser."""
    try:
        with zipfile.ZipFile(io.BytesIO(body)) as archive:
            entries = {n: archive.read(n) for n in archive.namelist()}
    except Exception:  # noqa: BLE001 - a damaged archive stays as it is
        return body
    names = sorted(entries)
    name = names[entry % len(names)]
    entries[name] = entries[name][:cut] + junk
    out = io.BytesIO()
    with zipfile.ZipFile(out, "w") as archive:
        for n, data in entries.items():
            archive.writestr(n, data)
    return out.getvalue()


def mutations(seeds: dict[str, bytes]) -> st.SearchStrategy[bytes]:
    base = st.sampled_from([seeds["model.skops"], seeds["model.joblib"]])

    @st.composite
    def mutated(draw) -> bytes:
        body = bytearray(draw(base))
        for _ in range(draw(st.integers(1, 4))):
            kind = draw(st.sampled_from(["cut", "flip", "insert", "zip", "splice"]))
            at = draw(st.integers(0, max(0, len(body) - 1)))
            if kind == "cut":
                body = body[:at]
            elif kind == "flip" and body:
                body[at] ^= draw(st.integers(1, 255))
            elif kind == "insert":
                body[at:at] = draw(st.binary(min_size=1, max_size=16))
            elif kind == "zip":
                body = bytearray(_edit_zip_entry(bytes(body), draw(st.integers(0, 99)),
                                                 draw(st.integers(0, 4000)),
                                                 draw(st.binary(max_size=32))))
            else:
                body = bytearray(b"PK\x03\x04") + body[at:]
        return bytes(body)

    return mutated()


def loader_check(folder: Path, seeds: dict[str, bytes], outcomes: Counter[str]
                 ) -> Callable[[], None]:
    from tree2sql.ingest import ingest
    from tree2sql.loading import load_model

    path = folder / "fuzzed.skops"

    @given(body=mutations(seeds))
    def check(body: bytes) -> None:
        path.write_bytes(body)
        try:
            ingest(load_model(path, allow_pickle=False))
            outcomes["loaded"] += 1
        except UserError:
            outcomes["refused"] += 1

    return check


def argv_strategy(folder: Path) -> st.SearchStrategy[list[str]]:
    hostile = st.sampled_from(["", "x0", "x0=x1", "=", "a=b=c", "'", '"', "`", "]", "--",
                               "/*", "é𝄞", "-1", "0", "99999999999999999999", "nan", "x0=",
                               "%s", "\\", "\n", "score_", "__t2s_x"])
    text = st.one_of(hostile, st.text(max_size=12))
    files = st.sampled_from([str(folder / n) for n in
                             ("model.skops", "model.joblib", "rows.csv", "fuzzed.skops",
                              "missing.skops", "out")] + [str(folder), ""])
    common = {
        "--key": st.sampled_from(["x0", "t2s_row", "nope"]) | text,
        "--column": text, "--prefix": text,
        "--combine": st.sampled_from(["average", "majority"]) | text,
        "--strategy": st.sampled_from(["nested_case", "node_arrays", "depth_staged",
                                       "model_table", "text_arrays"]) | text,
        "--allow-pickle": st.none(),
        "--reasons": st.sampled_from(["0", "1", "3", "-1", "x"]),
    }
    per_command = {
        "compile": {"--dialect": st.sampled_from(["duckdb", "sqlite", "tsql", "spark"]) | text,
                    "--table": text, "--output": st.just(str(folder / "out.sql"))},
        "verify": {"--data": files, "--table": text,
                   "--url": st.sampled_from([f"sqlite:///{folder / 'fuzz.db'}", "duckdb://",
                                             "not a url", "sqlite://", ""]),
                   "--sample": st.sampled_from(["1", "0", "-3", "x"]),
                   "--deployed": text, "--report": st.just(str(folder / "report.json"))},
        "inspect": {"--json": st.none(), "--dialect": st.sampled_from(["duckdb", "oracle"])
                    | text, "--exact-sizes": st.none()},
    }

    @st.composite
    def argv(draw) -> list[str]:
        command = draw(st.sampled_from(sorted(per_command)))
        pool = {**(common if command != "inspect" else {"--allow-pickle": st.none()}),
                **per_command[command]}
        args = [command]
        if draw(st.integers(0, 9)):  # usually a model path, sometimes none at all
            args.append(draw(files))
        for option in draw(st.lists(st.sampled_from(sorted(pool)), max_size=6)):
            args.append(option)
            value = pool[option]
            if not value.is_empty:
                drawn = draw(value)
                if drawn is not None:
                    args.append(drawn)
        rest = args[1:]
        if draw(st.booleans()):
            draw(st.randoms()).shuffle(rest)
        return [command, *rest]

    return argv()


def cli_check(folder: Path, outcomes: Counter[str]) -> Callable[[], None]:
    from click.testing import CliRunner

    from tree2sql.cli import cli

    @given(args=argv_strategy(folder))
    def check(args: list[str]) -> None:
        result = CliRunner().invoke(cli, args, catch_exceptions=False)
        text = result.output + (result.stderr if result.stderr_bytes is not None else "")
        assert result.exit_code in (0, 1, 2), (args, result.exit_code, text)
        assert "Traceback" not in text and "internal error" not in text, (args, text)
        outcomes[f"exit {result.exit_code}"] += 1

    return check


def run(seconds: float, first_seed: int = 0, echo: Callable[[str], None] = print) -> Counter:
    """Alternate loader and CLI batches until `seconds` have passed; return the outcomes."""
    outcomes: Counter[str] = Counter()
    deadline = time.monotonic() + seconds
    with tempfile.TemporaryDirectory(prefix="t2s-fuzz-") as tmp:
        folder = Path(tmp)
        seeds = seed_files(folder)
        budget = settings(max_examples=BATCH, deadline=None, database=None,
                          suppress_health_check=list(HealthCheck))
        checks = [budget(loader_check(folder, seeds, outcomes)),
                  budget(cli_check(folder, outcomes))]
        batch = 0
        while time.monotonic() < deadline:
            seed(first_seed + batch)(checks[batch % 2])()
            batch += 1
    outcomes["batches"] = batch
    echo("fuzz: " + ", ".join(f"{k} {v}" for k, v in sorted(outcomes.items())))
    return outcomes


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0, help="time budget")
    parser.add_argument("--seed", type=int, default=None,
                        help="first hypothesis seed (default: random)")
    options = parser.parse_args(argv)
    run(options.seconds, options.seed if options.seed is not None else random.randrange(2**31))
    return 0


if __name__ == "__main__":
    sys.exit(main())
