"""Run the compiled SQL, predict the same rows with the model, compare by key, report.

Agreement rules (DESIGN.md): probabilities within 1e-12 absolute (regression values within
1e-12 relative to max(1, |value|), as are all outputs after a link function such as a
sigmoid, whose EXP may differ from numpy's in the last bits); labels equal unless the
model's top two probabilities are within the tolerance (a tie, counted apart); NULL scores
exactly where the library refuses the row or cannot take its missing values.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from tree2sql.compiler import (
    Combine,
    CompiledQuery,
    ScoringRequest,
    compile_forest,
    compile_leaf_ids,
    text_columns,
)
from tree2sql.engines import Engine
from tree2sql.errors import UserError
from tree2sql.exact import bounds
from tree2sql.forest import Forest, Link
from tree2sql.inputs import InputPlan
from tree2sql.reference import Reference, apply_leaves, predict_reference, raw_frame
from tree2sql.schema import check_source

TOLERANCE = 1e-12
EXAMPLES = 5  # disagreeing rows explained in the report
CHUNK_ROWS = 100_000  # rows predicted per progress step


@dataclass
class Report:
    rows: int = 0
    disagreements: int = 0
    max_abs_diff: float = 0.0
    ties: int = 0
    null_scores: int = 0
    label_disagreements: int = 0
    value_disagreements: int = 0
    null_mismatches: int = 0
    null_missing: int = 0
    null_refused: int = 0
    tolerance: float = TOLERANCE
    dialect: str = ""
    strategy: str = ""
    combine: str = ""
    model: str = ""
    fingerprint: str = ""
    examples: list[dict[str, Any]] = field(default_factory=list)
    reasons: int = 0  # K reason codes checked per row (0: not asked for)
    reason_disagreements: int = 0
    reason_ties: int = 0
    reason_max_abs_diff: float = 0.0

    @property
    def agrees(self) -> bool:
        return self.disagreements == 0

    def to_json(self) -> str:
        return json.dumps(asdict(self), indent=2, default=_json_default)

    def to_text(self) -> str:
        verdict = "AGREE" if self.agrees else "DISAGREE"
        lines = [
            f"{verdict}: {self.rows} rows checked, {self.disagreements} disagreements "
            f"({self.dialect}, {self.strategy}, {self.combine})",
            f"  largest difference  {self.max_abs_diff:.3g} (tolerance {self.tolerance:g})",
            f"  label disagreements {self.label_disagreements}",
            f"  value disagreements {self.value_disagreements}",
            f"  NULL mismatches     {self.null_mismatches}",
            f"  ties (not counted)  {self.ties}",
            f"  NULL scores         {self.null_scores} "
            f"({self.null_missing} missing values the model cannot take, "
            f"{self.null_refused} values the library refuses)",
        ]
        if self.reasons:
            lines.append(f"  reason codes        {self.reason_disagreements} disagreements, "
                         f"{self.reason_ties} ties (top {self.reasons}, largest difference "
                         f"{self.reason_max_abs_diff:.3g})")
        for example in self.examples:
            lines.append("  row " + json.dumps(example, default=_json_default))
        return "\n".join(lines)


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    return str(value)


@dataclass
class ScoredRows:
    keys: list[np.ndarray]
    X: Any  # (rows, features) float64, NaN for NULL/NaN; a pipeline's raw-column frame
    values: np.ndarray  # (rows, outputs) float64, NaN for NULL
    labels: np.ndarray | None
    reasons: dict[str, np.ndarray] = field(default_factory=dict)  # reason column -> values


def verify(estimator: Any, forest: Forest, engine: Engine, request: ScoringRequest,
           progress: Callable[[int], None] | None = None,
           compiled: CompiledQuery | None = None) -> Report:
    """Score `request.table` in `engine` with the compiled SQL and compare with the model."""
    check_source(engine, request.table, _feature_columns(forest, request), request.keys,
                 text_columns(forest, request.columns))
    compiled = compiled or compile_forest(forest, request, engine.dialect)
    for statement in compiled.setup:  # e.g. the model table a strategy reads
        engine.execute(statement)
    scored = fetch_scored_rows(engine, compiled, request, forest.inputs)
    if len(scored.X) == 0:
        raise UserError(f"table {request.table!r} has no rows to verify",
                        "load data into it, or point --data at a file with rows")
    reference = _predict_in_chunks(estimator, forest, scored.X, request.combine, progress)
    report = compare(forest, scored, reference)
    report.dialect, report.strategy = compiled.dialect, compiled.strategy
    report.combine, report.model = request.combine.value, forest.source
    report.fingerprint = forest.fingerprint()
    if compiled.reason_columns:
        _check_reasons(estimator, forest, scored, reference, compiled, report)
    bad = _disagreeing_rows(forest, scored, reference)
    if len(bad):
        report.examples = explain(estimator, forest, engine, request, scored,
                                  reference, bad[:EXAMPLES])
    return report


def _feature_columns(forest: Forest, request: ScoringRequest) -> list[str]:
    from tree2sql.compiler import feature_columns

    return feature_columns(forest, request.columns)


def fetch_scored_rows(engine: Engine, compiled: CompiledQuery, request: ScoringRequest,
                      inputs: InputPlan | None = None) -> ScoredRows:
    """Scores from the SQL and the same rows' features, aligned by ordering on the keys.

    With a pipeline's input plan the raw columns are fetched as they are (text stays
    text) and X is the frame the pipeline reads; otherwise X is the double matrix.
    """
    from tree2sql.dialects import load_profile

    p = load_profile(engine.dialect)
    order = ", ".join(p.quote(k) for k in request.keys)
    text = inputs.text if inputs is not None else (False,) * len(compiled.feature_columns)
    features = ", ".join(f"{p.quote(c) if t else p.cast_double(p.quote(c))} "
                         f"AS {p.quote(f'__t2s_x{i}')}"
                         for i, (c, t) in enumerate(zip(compiled.feature_columns, text,
                                                        strict=True)))
    raw = engine.query(f"SELECT {order}, {features} FROM {p.qualified(request.table)} "
                       f"ORDER BY {order}")
    scored = engine.query(f"SELECT * FROM (\n{compiled.sql}\n) {p.quote('__t2s_s')} "
                          f"ORDER BY {order}")
    n_features = len(compiled.feature_columns)
    if inputs is not None:
        X = raw_frame(inputs, [_objects(raw[f"__t2s_x{i}"]) if t else _floats(raw[f"__t2s_x{i}"])
                               for i, t in enumerate(text)])
    else:
        X = np.column_stack([_floats(raw[f"__t2s_x{i}"]) for i in range(n_features)]) \
            if len(raw[request.keys[0]]) else np.empty((0, n_features))
    values = np.column_stack([_floats(scored[c]) for c in compiled.score_columns]) \
        if len(X) else np.empty((0, len(compiled.score_columns)))
    labels = None
    if compiled.label_column:
        labels = np.asarray(_objects(scored[compiled.label_column]), dtype=object)
    keys = [np.asarray(raw[k]) for k in request.keys]
    for k in request.keys:
        if not np.array_equal(np.asarray(raw[k]), np.asarray(scored[k])):
            raise UserError("the SQL returned other rows than the table holds",
                            "check that the key columns are unique and not NULL")
    reasons = {c: np.asarray(_objects(scored[c]), dtype=object) for c in compiled.reason_columns}
    return ScoredRows(keys, X, values, labels, reasons)


def _floats(column: Any) -> np.ndarray:
    if isinstance(column, np.ma.MaskedArray):
        return column.astype(np.float64).filled(np.nan)
    return np.array([np.nan if v is None else v for v in column], dtype=np.float64) \
        if column.dtype == object else column.astype(np.float64)


def _objects(column: Any) -> list[Any]:
    if isinstance(column, np.ma.MaskedArray):
        return [None if m else v for v, m in zip(column.data.tolist(),
                                                  np.ma.getmaskarray(column).tolist(),
                                                  strict=True)]
    return list(column.tolist())


def _predict_in_chunks(estimator: Any, forest: Forest, X: np.ndarray, combine: Combine,
                       progress: Callable[[int], None] | None) -> Reference:
    parts = []
    for start in range(0, len(X), CHUNK_ROWS):
        parts.append(predict_reference(estimator, forest, X[start:start + CHUNK_ROWS], combine))
        if progress:
            progress(min(CHUNK_ROWS, len(X) - start))
    return Reference(
        values=np.concatenate([p.values for p in parts]),
        labels=None if parts[0].labels is None else np.concatenate([p.labels for p in parts]),
        refused=np.concatenate([p.refused for p in parts]),
        missing=np.concatenate([p.missing for p in parts]),
    )


def _row_verdicts(forest: Forest, scored: ScoredRows, ref: Reference) -> dict[str, np.ndarray]:
    sql_null = np.isnan(scored.values).any(axis=1)
    null_mismatch = sql_null != ref.expected_null
    both = ~sql_null & ~ref.expected_null
    diff = np.where(both[:, None], np.abs(scored.values - np.nan_to_num(ref.values)), 0.0)
    allowed = _allowed(forest, ref)
    value_bad = both & (diff.max(axis=1, initial=0.0) > allowed)
    tie = np.zeros(len(diff), dtype=bool)
    label_bad = np.zeros(len(diff), dtype=bool)
    if forest.is_classifier and forest.n_outputs > 1:
        top2 = np.sort(np.nan_to_num(ref.values), axis=1)[:, -2:]
        tie = both & (top2[:, 1] - top2[:, 0] < TOLERANCE)
    if forest.is_classifier:
        same = np.array([a == b for a, b in zip(scored.labels.tolist(), ref.labels.tolist(),
                                                strict=True)], dtype=bool)
        label_bad = both & ~same & ~tie
    return {"null_mismatch": null_mismatch, "value_bad": value_bad, "label_bad": label_bad,
            "tie": tie, "diff": diff, "sql_null": sql_null}


def _allowed(forest: Forest, ref: Reference) -> np.ndarray:
    """Largest difference allowed per row (see the module docstring)."""
    if forest.aggregation.link is not Link.IDENTITY:  # exp in SQL vs numpy: last bits
        return TOLERANCE * np.maximum(1.0, np.abs(np.nan_to_num(ref.values)).max(axis=1))
    if forest.is_classifier:
        return np.full(len(ref.values), TOLERANCE)
    return TOLERANCE * np.maximum(1.0, np.abs(np.nan_to_num(ref.values[:, 0])))


def _check_reasons(estimator: Any, forest: Forest, scored: ScoredRows, ref: Reference,
                   compiled: CompiledQuery, report: Report) -> None:
    """Reason codes against path attribution from the library's own trees."""
    from tree2sql.reasons_check import check_reason_columns

    columns = compiled.reason_columns
    names = np.column_stack([scored.reasons[c] for c in columns[0::2]])
    credits = np.column_stack([_floats(scored.reasons[c]) for c in columns[1::2]])
    verdict = check_reason_columns(estimator, forest, scored.X, names, credits,
                                   ref.expected_null, ref.labels, _allowed(forest, ref))
    report.reasons = len(columns) // 2
    report.reason_disagreements, report.reason_ties = verdict.disagreements, verdict.ties
    report.reason_max_abs_diff = verdict.max_abs_diff
    report.disagreements += verdict.disagreements


def compare(forest: Forest, scored: ScoredRows, ref: Reference) -> Report:
    v = _row_verdicts(forest, scored, ref)
    bad = v["null_mismatch"] | v["value_bad"] | v["label_bad"]
    return Report(
        rows=len(scored.X),
        disagreements=int(bad.sum()),
        max_abs_diff=float(v["diff"].max(initial=0.0)),
        ties=int(v["tie"].sum()),
        null_scores=int(v["sql_null"].sum()),
        label_disagreements=int(v["label_bad"].sum()),
        value_disagreements=int(v["value_bad"].sum()),
        null_mismatches=int(v["null_mismatch"].sum()),
        null_missing=int(ref.missing.sum()),
        null_refused=int(ref.refused.sum()),
    )


def _disagreeing_rows(forest: Forest, scored: ScoredRows, ref: Reference) -> np.ndarray:
    v = _row_verdicts(forest, scored, ref)
    return np.flatnonzero(v["null_mismatch"] | v["value_bad"] | v["label_bad"])


def explain(estimator: Any, forest: Forest, engine: Engine, request: ScoringRequest,
            scored: ScoredRows, ref: Reference, rows: Sequence[int]) -> list[dict[str, Any]]:
    """For each disagreeing row: the first tree, and the split in it, where SQL and model part.

    The SQL side comes from the same strategy rendering leaf ids instead of values; the
    model side from the library's own `apply`.
    """
    from tree2sql.dialects import load_profile

    p = load_profile(engine.dialect)
    order = ", ".join(p.quote(k) for k in request.keys)
    leaf_sql = compile_leaf_ids(forest, request, engine.dialect)
    leaves_sql = engine.query(f"SELECT * FROM (\n{leaf_sql}\n) {p.quote('__t2s_l')} "
                              f"ORDER BY {order}")
    examples = []
    for row in rows:
        example: dict[str, Any] = {
            "key": [k[row] for k in scored.keys],
            "sql": scored.values[row].tolist(),
            "model": ref.values[row].tolist(),
        }
        if forest.is_classifier:
            example["sql_label"], example["model_label"] = scored.labels[row], ref.labels[row]
        if not ref.expected_null[row] and hasattr(estimator, "apply") and not forest.derived:
            x = scored.X[row]
            model_leaves = apply_leaves(estimator, x[None, :])[0]
            example.update(_first_divergence(forest, x, model_leaves,
                                             [int(leaves_sql[f"__t2s_leaf{t}"][row])
                                              for t in range(len(forest.trees))]))
        examples.append(example)
    return examples


def _first_divergence(forest: Forest, x: np.ndarray, model_leaves: np.ndarray,
                      sql_leaves: list[int]) -> dict[str, Any]:
    for t, (mine, theirs) in enumerate(zip(sql_leaves, model_leaves.tolist(), strict=True)):
        if mine == theirs:
            continue
        tree = forest.trees[t]
        path_sql, path_model = tree.path_to(mine), tree.path_to(int(theirs))
        common = [a for a, b in zip(path_sql, path_model, strict=False) if a == b]
        node = common[-1]
        f = int(tree.feature[node])
        return {"tree": t, "node": node, "feature": forest.feature_names[f],
                "value": float(x[f]), "threshold": float(tree.threshold[node]),
                "sql_bound": float(bounds(tree.threshold[node:node + 1], forest.comparison)[0]),
                "sql_leaf": mine, "model_leaf": int(theirs)}
    return {"tree": None, "note": "every tree reached the same leaf in SQL and in the model; "
                                  "the difference arises in the engine's arithmetic"}
