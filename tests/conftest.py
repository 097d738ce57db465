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
