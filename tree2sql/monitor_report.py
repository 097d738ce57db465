"""Run the monitoring statement and turn its rows into a report with alert levels.

PSI levels (common practice, no single source): below 0.1 stable, 0.1 up to 0.25 a
moderate shift worth a look ("warn"), 0.25 and above a significant shift ("alert").
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from tree2sql.engines import Engine
from tree2sql.errors import UserError
from tree2sql.monitor_sql import OUTPUT_COLUMNS, PSI_FLOOR, MonitorQuery

WARN_PSI, ALERT_PSI = 0.1, 0.25
COUNTS = ("labelled_rows", "unknown_labels")  # outcome figures that are row counts


@dataclass
class Drift:
    kind: str  # "feature" or "score"
    name: str
    psi: float | None
    missing_share: float | None
    below_range_share: float | None
    above_range_share: float | None
    level: str = "ok"  # "ok", "warn", "alert" ("n/a" when no PSI: no rows, text input)


@dataclass
class MonitorReport:
    rows: int
    scored_rows: int
    drift: list[Drift]
    outcome: dict[str, Any] = field(default_factory=dict)
    confusion: dict[str, dict[str, int]] = field(default_factory=dict)
    warn_psi: float = WARN_PSI
    alert_psi: float = ALERT_PSI
    psi_floor: float = PSI_FLOOR

    @property
    def alerts(self) -> list[Drift]:
        return [d for d in self.drift if d.level == "alert"]

    def to_json(self) -> str:
        return json.dumps(asdict(self) | {"alerting": bool(self.alerts)}, indent=2)

    def to_text(self) -> str:
        lines = [f"{self.rows} rows monitored, {self.scored_rows} scored; PSI levels: warn "
                 f">= {self.warn_psi:g}, alert >= {self.alert_psi:g}"]
        width = max([len(d.name) for d in self.drift] + [4])
        lines.append(f"  {'kind':7} {'name':{width}}  {'psi':>8}  {'missing':>8}  "
                     f"{'below':>8}  {'above':>8}  level")
        for d in sorted(self.drift, key=lambda d: (d.kind != "score", -(d.psi or 0.0))):
            lines.append(f"  {d.kind:7} {d.name:{width}}  {_num(d.psi):>8}  "
                         f"{_num(d.missing_share):>8}  {_num(d.below_range_share):>8}  "
                         f"{_num(d.above_range_share):>8}  {d.level}")
        if self.outcome:
            lines.append("outcomes (rows with a label and a score):")
            for name, value in self.outcome.items():
                shown = {k: _num(v) for k, v in value.items()} if isinstance(value, dict) \
                    else _num(value)
                lines.append(f"  {name}: {shown}")
        if self.confusion:
            classes = list(self.confusion)
            lines.append("confusion matrix (rows: true class, columns: predicted):")
            cell = max([len(c) for c in classes] + [6])
            lines.append("  " + " " * cell + "".join(f" {c:>{cell}}" for c in classes))
            for true in classes:
                lines.append(f"  {true:>{cell}}" + "".join(
                    f" {self.confusion[true].get(p, 0):>{cell}}" for p in classes))
        verdict = (f"ALERT: {len(self.alerts)} of {len(self.drift)} monitored quantities "
                   f"shifted (PSI >= {self.alert_psi:g}): "
                   + ", ".join(d.name for d in self.alerts)) if self.alerts \
            else f"no PSI at or above {self.alert_psi:g}"
        return "\n".join([*lines, verdict])


def _num(value: float | None) -> str:
    if value is None:
        return "-"
    if float(value).is_integer() and abs(value) >= 1:
        return str(int(value))
    return f"{value:.4f}"


def run_monitor(engine: Engine, query: MonitorQuery, warn_psi: float = WARN_PSI,
                alert_psi: float = ALERT_PSI) -> MonitorReport:
    """Run the statement (after its setup) and read its rows into a report."""
    if not 0 <= warn_psi <= alert_psi:
        raise UserError(f"PSI levels must satisfy 0 <= warn ({warn_psi}) <= alert "
                        f"({alert_psi})", "e.g. --warn-psi 0.1 --alert-psi 0.25")
    try:
        for statement in query.setup:
            engine.execute(statement)
        found = engine.query(query.sql)
    except _engine_errors() as exc:
        raise UserError(f"the database refused the monitoring statement: "
                        f"{str(exc).splitlines()[0]}",
                        "check --table, --scores, --key, --label and --prefix against the "
                        "tables (print the statement with --dialect)") from exc
    return read_rows(found, warn_psi, alert_psi)


def _engine_errors() -> tuple[type[BaseException], ...]:
    """Errors raised by the engines themselves (as opposed to bugs in tree2sql); looked up
    only when something failed."""
    import importlib.util

    from tree2sql.deploy import _database_errors

    found = list(_database_errors())
    if importlib.util.find_spec("chdb") is not None:
        from chdb import ChdbError

        found.append(ChdbError)
    if importlib.util.find_spec("pyspark") is not None:
        from pyspark.errors import PySparkException

        found.append(PySparkException)
    return tuple(found)


def read_rows(found: dict[str, Any], warn_psi: float = WARN_PSI,
              alert_psi: float = ALERT_PSI) -> MonitorReport:
    """The report from the statement's rows (columns as in monitor_sql.OUTPUT_COLUMNS)."""
    columns = {c.lower(): v for c, v in found.items()}
    rows = list(zip(*(_cells(columns[c]) for c in OUTPUT_COLUMNS), strict=True))
    report = MonitorReport(rows=0, scored_rows=0, drift=[], warn_psi=warn_psi,
                           alert_psi=alert_psi)
    for kind, subject, part, value, missing, below, above in rows:
        part = part or ""  # Oracle reads '' as NULL
        if kind == "table":
            setattr(report, subject, int(value or 0))
        elif kind in ("feature", "score"):
            level = "n/a" if value is None else "alert" if value >= alert_psi \
                else "warn" if value >= warn_psi else "ok"
            report.drift.append(Drift(kind, subject, value, missing, below, above, level))
        elif kind == "confusion":
            report.confusion.setdefault(subject, {})[part] = int(value or 0)
        elif part:
            report.outcome.setdefault(f"{subject}_per_class", {})[part] = value
        elif subject in COUNTS:
            report.outcome[subject] = int(value or 0)
        else:
            report.outcome[subject] = value
    return report


def _cells(column: Any) -> list[Any]:
    """Python values with NULL (and a NaN some drivers give for it) as None."""
    if isinstance(column, np.ma.MaskedArray):
        mask = np.ma.getmaskarray(column).tolist()
        values = column.data.tolist()
    else:
        values = list(column.tolist()) if hasattr(column, "tolist") else list(column)
        mask = [False] * len(values)
    out = []
    for v, m in zip(values, mask, strict=True):
        if m or v is None or (isinstance(v, float) and math.isnan(v)):
            out.append(None)
        else:
            out.append(float(v) if isinstance(v, (int, float)) and not isinstance(v, bool)
                       else v)
    return out
