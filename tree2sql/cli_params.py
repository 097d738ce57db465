"""The click parameter types every command shares for files, folders and database URLs:
values that cannot work fail as usage errors (exit 2) before any command runs."""

from __future__ import annotations

from pathlib import Path

import click


class PathParam(click.Path):
    """click.Path that turns an unusable name (a NUL byte, which the OS rejects with
    ValueError rather than OSError) into a usage error instead of a crash."""

    def convert(self, value, param, ctx):
        if "\x00" in str(value):
            self.fail(f"{str(value)!r} contains a NUL byte, which no file name can hold; "
                      "give a real path", param, ctx)
        return super().convert(value, param, ctx)


class UrlParam(click.ParamType):
    """A SQLAlchemy URL; a blank one is refused rather than read as 'no URL given'."""

    name = "URL"

    def convert(self, value, param, ctx):
        if not str(value).strip() or "\x00" in str(value):
            self.fail(f"{str(value)!r} is not a database URL; give a SQLAlchemy URL such as "
                      "postgresql+psycopg://user@host/db or sqlite:///scores.db", param, ctx)
        return str(value)


FILE = PathParam(dir_okay=False, path_type=Path)
FOLDER = PathParam(file_okay=False, path_type=Path)
URL = UrlParam()
