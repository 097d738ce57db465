"""The inspection report as readable text tables (the default output of `tree2sql inspect`)."""

from __future__ import annotations

from tree2sql.inspect import Inspection, ShapeReport, Spread

MAX_FEATURE_ROWS = 50  # beyond this the text lists the most used features; JSON has all
MAX_NAMES = 20  # unused feature names spelt out before "and N more"


def render_text(report: Inspection) -> str:
    return "\n".join([*_model(report), "", *_trees(report), "", *_features(report), "",
                      *_shapes(report), "", *_planner(report)])


def _model(r: Inspection) -> list[str]:
    if r.classes is None:
        task = "regression"
    else:
        task = f"classification, {len(r.classes)} classes: " + ", ".join(map(repr, r.classes))
    missing = ("accepted: NULL/NaN follow each split's missing-value direction"
               if r.accepts_missing else
               "refused: rows with a NULL/NaN feature get NULL scores")
    return [r.source or "model",
            f"  task         {task}",
            f"  trees        {r.n_trees} ({r.n_nodes:,} nodes, {r.n_leaves:,} leaves)",
            f"  comparison   {r.comparison}",
            f"  combined as  {r.aggregation}",
            f"  missing      {missing}",
            f"  fingerprint  sha256:{r.fingerprint}"]


def _trees(r: Inspection) -> list[str]:
    def row(name: str, s: Spread) -> str:
        return f"  {name:8} {s.min:>8g} {s.median:>8g} {s.max:>8g}"

    return [f"per tree {'min':>8} {'median':>8} {'max':>8}",
            row("depth", r.depth), row("leaves", r.leaves), row("nodes", r.nodes)]


def _features(r: Inspection) -> list[str]:
    used = [f for f in r.features if f.splits]
    total = sum(f.splits for f in r.features) or 1
    shown = r.features
    title = f"features: {len(r.features)}, {len(used)} used; splits over all trees"
    if len(shown) > MAX_FEATURE_ROWS:
        top = sorted(shown, key=lambda f: -f.splits)[:MAX_FEATURE_ROWS]
        shown = sorted(top, key=lambda f: f.index)
        title += f" (the {MAX_FEATURE_ROWS} most used, in model order; --json lists all)"
    width = max([7, *(len(f.name) for f in shown)])
    lines = [title, f"  {'#':>4}  {'feature':{width}}  {'splits':>7}  {'trees':>6}  {'share':>6}"]
    lines += [f"  {f.index:>4}  {f.name:{width}}  {f.splits:>7}  {f.trees:>6}  "
              f"{f.splits / total:>6.1%}" for f in shown]
    unused = r.unused_features
    names = ", ".join(unused[:MAX_NAMES])
    if len(unused) > MAX_NAMES:
        names += f" and {len(unused) - MAX_NAMES} more"
    lines.append(f"  unused: {names or 'none'}")
    return lines


def _shapes(r: Inspection) -> list[str]:
    chosen = {(p.dialect, p.strategy) for p in r.planner}
    lines = ["SQL per dialect and strategy",
             f"  {'dialect':10} {'strategy':13} {'planner':7} {'bytes':>12} {'from':8} "
             f"{'CASE':>4} {'expr':>5} {'cols':>5} {'args':>5}  limits crossed"]
    unchecked = set()
    for s in r.shapes:
        verdict = ("chosen" if (s.dialect, s.strategy) in chosen else
                   "-" if not s.listed else "no" if s.planner_estimate else "fits")
        unchecked.update(f"{s.dialect}.{c.limit}" for c in s.limits if c.measure is None)
        shown = s.renders is not False and s.statement_bytes is not None
        size, source = (f"{s.statement_bytes:,}", s.size_from) if shown else ("-", "-")
        lines.append(f"  {s.dialect:10} {s.strategy:13} {verdict:7} "
                     f"{size:>12} {source:8} {_num(s.case_depth):>4} "
                     f"{_num(s.expression_depth):>5} {_num(s.select_items):>5} "
                     f"{_num(s.case_arguments):>5}  {_crossed(s)}")
    lines += [
        "  planner: chosen / fits / no (its estimates break a limit) / - (not in the "
        "profile's list); bytes: the SELECT statement;",
        "  CASE: deepest CASE nesting; expr: deepest nesting of brackets, CASE and + chains; "
        "cols: widest select list (* counts 1);",
        "  args: most WHEN/THEN/ELSE arguments in one CASE; limits crossed: by these figures "
        "(statement_bytes also by setup statements)"]
    if r.measure_limit is not None:
        lines.append(f"  bytes are the strategy's estimate when the model has over "
                     f"{r.measure_limit:,} node outputs (nodes x outputs; --exact-sizes "
                     "compiles anyway)")
    if any(s.figures_from == "deepest tree" for s in r.shapes):
        lines.append("  then CASE and args come from the deepest tree per output compiled "
                     "alone; expr and cols are not measured (-)")
    if unchecked:
        lines.append("  limits inspect does not measure: " + ", ".join(sorted(unchecked)))
    return lines


def _crossed(s: ShapeReport) -> str:
    if s.renders is False:
        return f"cannot render: {s.error}"
    crossed = [f"{c.limit} ({c.observed:,} > {c.allowed:,})" for c in s.limits if c.crossed]
    unknown = [c.limit for c in s.limits if c.measure and c.observed is None
               and s.size_from == "compiled"]  # estimates: the footnote says what is missing
    text = ", ".join(crossed) or "none"
    if unknown:
        text += f"; not measured: {', '.join(unknown)}"
    return text


def _planner(r: Inspection) -> list[str]:
    width = max([7, *(len(p.dialect) for p in r.planner)])
    return ["planner (what `tree2sql compile` would choose, and why)"] + [
        f"  {p.dialect:{width}}  {p.strategy or 'none':13} {p.reason}" for p in r.planner]


def _num(value: int | None) -> str:
    return "-" if value is None else str(value)
