"""Errors a user can act on: each names the problem and the fix; the CLI exits 2 on them."""

from __future__ import annotations


class UserError(Exception):
    """Bad input or usage. `fix` tells the user what to do about it."""

    def __init__(self, problem: str, fix: str = "") -> None:
        self.problem = problem
        self.fix = fix
        super().__init__(f"{problem}\n  fix: {fix}" if fix else problem)
