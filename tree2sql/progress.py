"""Progress on long work, shown on a terminal and silent otherwise (logs, pipes, CI)."""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager

import click


@contextmanager
def progress(label: str, total: int,
             enabled: bool | None = None) -> Iterator[Callable[[int], None]]:
    """Yield `advance(n)`; draws a bar on stderr only when stderr is a terminal."""
    if enabled is None:
        enabled = sys.stderr.isatty()
    if not enabled or total <= 0:
        yield lambda n: None
        return
    with click.progressbar(length=total, label=label, file=sys.stderr) as bar:
        yield bar.update
