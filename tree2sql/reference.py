"""The library's own answers for a batch of rows: the reference the SQL is checked against.

Rows the library refuses (infinite or beyond float32 range) and rows with missing values
for a model that cannot take them are set apart first, as the SQL gives them NULL scores;
the rest are predicted by the estimator itself, single-threaded so that per-tree values
are summed in tree order exactly as the SQL does.
"""

from __future__ import annotations

import copy
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from tree2sql.compiler import Combine
from tree2sql.exact import FLOAT32_OVERFLOW
from tree2sql.forest import Forest, Task
from tree2sql.inputs import InputPlan


@dataclass
class Reference:
    values: np.ndarray  # (rows, outputs) float64, NaN where no score is expected
    labels: np.ndarray | None  # object array of labels (None where no score), classifiers
    refused: np.ndarray  # bool per row: the library refuses the row
    missing: np.ndarray  # bool per row: missing value, model cannot take it

    @property
    def expected_null(self) -> np.ndarray:
        return self.refused | self.missing


def row_status(forest: Forest, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(refused, missing) masks; refused wins when a row has both."""
    refused = np.zeros(len(X), dtype=bool)
    if forest.refuses_float32_overflow:
        with np.errstate(invalid="ignore"):
            refused = np.any(np.abs(X) >= FLOAT32_OVERFLOW, axis=1)
    missing = np.zeros(len(X), dtype=bool)
    if not forest.accepts_missing:
        missing = np.any(np.isnan(X), axis=1) & ~refused
    return refused, missing


def single_threaded(estimator: Any) -> Any:
    """A shallow copy predicting on one thread, so trees are summed in order."""
    if getattr(estimator, "n_jobs", None) not in (None, 1):
        estimator = copy.copy(estimator)
        estimator.n_jobs = 1
    return estimator


def predict_reference(estimator: Any, forest: Forest, X: Any,
                      combine: Combine = Combine.AVERAGE) -> Reference:
    """`X`: the double matrix, or for a pipeline the raw-column frame (see `raw_frame`)."""
    refused_early = np.zeros(len(X), dtype=bool)
    if forest.inputs is not None:
        estimator, X, refused_early = preprocess(estimator, X, forest.n_features)
    refused, missing = row_status(forest, X)
    refused |= refused_early
    missing &= ~refused
    keep = ~(refused | missing)
    values = np.full((len(X), forest.n_outputs), np.nan)
    labels = np.full(len(X), None, dtype=object) if forest.is_classifier else None
    if keep.any():
        rows = X[keep]
        model = single_threaded(estimator)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # fitted with names, given an array
            if forest.task is Task.ANOMALY:
                values[keep, 0] = model.score_samples(rows)
                values[keep, 1] = model.decision_function(rows)
            elif not forest.is_classifier:
                values[keep, 0] = model.predict(rows)
            elif combine is Combine.MAJORITY:
                values[keep], labels[keep] = _majority(model, forest, rows)
            else:
                values[keep] = model.predict_proba(rows)
                labels[keep] = model.predict(rows)
    return Reference(values, labels, refused, missing)


def raw_frame(plan: InputPlan, columns: list[Any]) -> pd.DataFrame:
    """The raw rows as the pipeline reads them: numeric columns float64 with NaN for NULL,
    text columns object with None or NaN for NULL (whichever the pipeline learned)."""
    data = {}
    for name, values, text, as_none in zip(plan.columns, columns, plan.text,
                                           plan.null_as_none, strict=True):
        if text:
            gap = None if as_none else np.nan
            values = np.array([gap if v is None else v for v in values], dtype=object)
        data[name] = pd.Series(values, dtype=object if text else np.float64)
    return pd.DataFrame(data)


def preprocess(pipeline: Any, frame: pd.DataFrame, width: int) -> tuple[Any, np.ndarray,
                                                                       np.ndarray]:
    """(final estimator, the library's transformed rows, rows its preprocessing refuses).

    Pipeline.predict is the final step's predict on the preceding steps' transform, so
    the reference takes the same two steps. A batch the preprocessing refuses (an unknown
    category, an infinite value) is halved until the refused rows are found, so a few bad
    rows cost a few transforms, not one per row; their transformed rows are left zero.
    """
    steps, final = pipeline[:-1], pipeline[-1]
    rows = frame if pipeline_named(pipeline) else frame.to_numpy()
    out = np.zeros((len(frame), width))
    refused = np.zeros(len(frame), dtype=bool)
    pending = [(0, len(frame))]
    while pending:
        start, stop = pending.pop()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # e.g. unknown categories encoded as zeros
                block = steps.transform(rows[start:stop]) if len(pipeline) > 1 \
                    else rows[start:stop]
        except ValueError:
            if stop - start == 1:
                refused[start] = True
            else:
                middle = (start + stop) // 2
                pending += [(middle, stop), (start, middle)]
            continue
        block = block.toarray() if hasattr(block, "toarray") else block
        out[start:stop] = np.asarray(block, dtype=np.float64)
    return final, out, refused


def pipeline_named(pipeline: Any) -> bool:
    """Whether the pipeline was fit on a frame with column names (else on an array)."""
    return getattr(pipeline, "feature_names_in_", None) is not None


def _majority(model: Any, forest: Forest, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each tree votes its top class (the library's per-tree predict_proba, first max)."""
    members = getattr(model, "estimators_", None) or [model]
    votes = np.zeros((len(rows), forest.n_outputs))
    for member in members:
        top = np.argmax(member.predict_proba(rows), axis=1)
        votes[np.arange(len(rows)), top] += 1
    classes = np.array(forest.classes, dtype=object)
    return votes / len(members), classes[np.argmax(votes, axis=1)]


def apply_leaves(estimator: Any, X: np.ndarray) -> np.ndarray:
    """The library's own leaf ids, shape (rows, trees)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        leaves = single_threaded(estimator).apply(X)
    return leaves.reshape(len(X), -1)
