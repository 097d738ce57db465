"""Errors a user can act on: each names the problem and the fix; the CLI exits 2 on them."""

from __future__ import annotations

from pathlib import Path


class UserError(Exception):
    """Bad input or usage. `fix` tells the user what to do about it."""

    def __init__(self, problem: str, fix: str = "") -> None:
        self.problem = problem
        self.fix = fix
        super().__init__(f"{problem}\n  fix: {fix}" if fix else problem)


def existing_file(path: str | Path, kind: str, missing_fix: str, empty_fix: str) -> Path:
    """`path` as a Path, or a UserError when it is not a file or is empty."""
    path = Path(path)
    if not path.is_file():
        raise UserError(f"{kind} file {str(path)!r} does not exist", missing_fix)
    if path.stat().st_size == 0:
        raise UserError(f"{kind} file {str(path)!r} is empty", empty_fix)
    return path
