"""Locate the data folders shipped beside the code (dialect profiles, examples).

A wheel carries them inside the package (`tree2sql/_bundled/`); a source checkout or an
editable install reads them from the repository's top level.
"""

from __future__ import annotations

from pathlib import Path

_PACKAGE = Path(__file__).resolve().parent


def data_dir(name: str) -> Path:
    for candidate in (_PACKAGE / "_bundled" / name, _PACKAGE.parent / name):
        if candidate.is_dir():
            return candidate
    raise FileNotFoundError(f"tree2sql's {name}/ folder is missing from this installation")
