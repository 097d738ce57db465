"""Shared fixtures. Engines are real; a test that needs a server it cannot reach is skipped
locally, but fails under CI (TREE2SQL_REQUIRE_ENGINES=1), so a green CI ran everything."""

from __future__ import annotations

import os

import pytest

REQUIRE_ENGINES = os.environ.get("TREE2SQL_REQUIRE_ENGINES") == "1"


def need(condition: bool, reason: str) -> None:
    """Skip (locally) or fail (in CI) when an engine a test needs is unavailable."""
    if condition:
        return
    if REQUIRE_ENGINES:
        pytest.fail(f"required engine unavailable: {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def pg_url() -> str:
    """SQLAlchemy URL of the loopback PostgreSQL server started by .ci/services.sh."""
    url = os.environ.get("TREE2SQL_PG_URL", "")
    need(bool(url), "PostgreSQL: run `eval \"$(bash .ci/services.sh)\"` to start one")
    return url
