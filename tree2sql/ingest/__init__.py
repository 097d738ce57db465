"""Turn a trained estimator into the neutral `Forest`.

Each model family lives in its own module and registers the estimator types it reads.
Adding a family means adding a module and one import below.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from tree2sql.errors import UserError
from tree2sql.forest import Forest

Reader = Callable[[Any], Forest]
_READERS: dict[str, Reader] = {}


def reads(*type_names: str) -> Callable[[Reader], Reader]:
    """Register a reader for estimator classes named `type_names`."""

    def register(reader: Reader) -> Reader:
        for name in type_names:
            _READERS[name] = reader
        return reader

    return register


def supported() -> list[str]:
    return sorted(_READERS)


def ingest(estimator: Any) -> Forest:
    name = type(estimator).__name__
    reader = _READERS.get(name)
    if reader is None:
        raise UserError(
            f"tree2sql cannot compile a {name}",
            "supported estimators: " + ", ".join(supported()),
        )
    return reader(estimator)


# Each family module registers its readers on import.
from tree2sql.ingest import (  # noqa: E402,F401
    isolation,
    lightgbm_json,
    pipelines,
    sklearn_boosting,
    sklearn_trees,
    xgboost_json,
)
