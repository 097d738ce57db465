"""Figures of a SQL statement that engines cap: CASE nesting, expression depth, the widest
select list and the most arguments in one CASE.

A DBA needs them before running a statement (SQL Server allows 10 levels of nested CASE;
DuckDB and SQLite an expression depth of 1000; Oracle 1000 columns per select list and
65535 arguments per CASE). A parser would do, but tokenizing megabytes of SQL in Python
takes seconds; this scanner skips only what can hide a keyword or bracket (comments,
string literals, numbers, quoted identifiers, written the way the dialect's profile writes
them) and counts the rest.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

from tree2sql.dialects import Profile

CASE_ARGUMENTS = ("WHEN", "THEN", "ELSE")
ITEM_ENDS = ("FROM", "WHERE", "SELECT")  # an expression ends here, as at a comma


@dataclass(frozen=True)
class StatementFigures:
    case_depth: int  # deepest CASE inside CASE
    expression_depth: int  # deepest bracket/CASE nesting plus chains of `+` (see _Frame)
    select_items: int  # most items in one select list (`*` counts as one)
    case_arguments: int  # most WHEN, THEN, ELSE and operand expressions in one CASE


@dataclass
class _Frame:
    """One open bracket or CASE. A chain `a + b + c` parses left-deep, so its first term
    sits one level deeper per `+`: an item's depth is its `+` count plus its deepest child."""

    is_case: bool
    plus: int = 0
    child: int = 0
    best: int = 0
    arguments: int = 0
    select: list[int] = field(default_factory=list)  # [items] while a select list is open

    def end_item(self) -> None:
        self.best = max(self.best, self.plus + self.child)
        self.plus = self.child = 0


def _quoted(opener: str, closer: str, escaped_closer: str) -> str:
    """Regex for text between opener and closer, with closer written as escaped_closer."""
    if escaped_closer.startswith("\\"):
        body = rf"(?:\\.|[^{re.escape(closer)}\\])*"
    else:
        body = rf"(?:{re.escape(escaped_closer)}|[^{re.escape(closer)}])*"
    return re.escape(opener) + body + re.escape(closer)


def _scanner(profile: Profile) -> re.Pattern[str]:
    """Tokens that matter, with quoting learnt from the profile's own quote/string."""
    ident = profile.quote("a")
    open_id, close_id = ident[0], ident[-1]
    escaped_id = profile.quote(f"a{close_id}b")[2:-2]
    text = profile.string("a")
    open_s, close_s = text[0], text[-1]
    escaped_s = profile.string(f"a{close_s}b")[2:-2]
    skip = [r"--[^\n]*", r"/\*.*?\*/", _quoted(open_s, close_s, escaped_s),
            _quoted(open_id, close_id, escaped_id), r"\w*\d\.?\d*(?:[eE][+-]?\d+)?\w*"]
    words = "|".join(("CASE", "END", *CASE_ARGUMENTS, *ITEM_ENDS))
    return re.compile("|".join([*skip, rf"\b(?:{words})\b", r"[()\[\],+]"]),
                      re.IGNORECASE | re.DOTALL)


def measure_statement(sql: str, profile: Profile) -> StatementFigures:
    stack = [_Frame(is_case=False)]
    cases = deepest_case = widest_select = widest_case = 0
    for match in _scanner(profile).finditer(sql):
        token = match.group().upper()
        top = stack[-1]
        if token in ("(", "[", "CASE"):
            frame = _Frame(is_case=token == "CASE")
            if frame.is_case:
                cases += 1
                deepest_case = max(deepest_case, cases)
                simple = not sql[match.end():match.end() + 40].lstrip().upper() \
                    .startswith("WHEN")
                frame.arguments = int(simple)  # the operand of `CASE x WHEN ...`
            stack.append(frame)
        elif token in (")", "]", "END"):
            if len(stack) == 1:
                continue  # unbalanced text: ignore rather than fail a report
            closed = stack.pop()
            closed.end_item()
            if closed.select:
                widest_select = max(widest_select, closed.select[0])
            if closed.is_case:
                cases -= 1
                widest_case = max(widest_case, closed.arguments)
            stack[-1].child = max(stack[-1].child, 1 + closed.best)
        elif token == "+":
            top.plus += 1
        elif token == ",":
            top.end_item()
            if top.select:
                top.select[0] += 1
        elif token in CASE_ARGUMENTS:
            top.end_item()
            if top.is_case:
                top.arguments += 1
        elif token in ITEM_ENDS:
            top.end_item()
            if top.select:
                widest_select = max(widest_select, top.select.pop())
            if token == "SELECT":
                top.select.append(1)
    while len(stack) > 1:  # close what unbalanced text left open
        closed = stack.pop()
        closed.end_item()
        stack[-1].child = max(stack[-1].child, 1 + closed.best)
    stack[0].end_item()
    if stack[0].select:
        widest_select = max(widest_select, stack[0].select[0])
    return StatementFigures(deepest_case, stack[0].best, widest_select, widest_case)
