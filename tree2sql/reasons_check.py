"""Check the SQL's reason codes against path attribution computed from the library itself.

The reference reads each fitted tree's own `decision_path` and `tree_.value` (not the
neutral model the SQL was compiled from), credits each step down the path to the split's
feature, and averages over the trees. A row agrees when each reported feature's credit
matches the reference within the tolerance and its magnitude is the one expected at that
rank; a different feature with a magnitude within the tolerance of the expected one is a
tie (counted apart, like label ties), since either order is then right.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import sparse

from tree2sql.forest import Forest
from tree2sql.reasons import explained_outputs
from tree2sql.reference import single_threaded


@dataclass
class ReasonVerdict:
    disagreements: int = 0
    ties: int = 0
    max_abs_diff: float = 0.0


def reference_credits(estimator: Any, forest: Forest, X: np.ndarray) -> np.ndarray:
    """(rows, n_features, explained outputs): per feature, the library trees' path credits
    averaged over the trees (summed in tree order, then divided)."""
    model = single_threaded(estimator)
    members = getattr(model, "estimators_", None) or [model]
    outputs = explained_outputs(forest)
    total = np.zeros((len(X), forest.n_features * len(outputs)))
    for member in members:
        tree = member.tree_
        value = tree.value[:, 0, :][:, outputs]
        parent = np.full(tree.node_count, -1)
        inner = np.flatnonzero(tree.children_left >= 0)
        parent[tree.children_left[inner]] = inner
        parent[tree.children_right[inner]] = inner
        child = np.flatnonzero(parent >= 0)
        delta = value[child] - value[parent[child]]
        columns = tree.feature[parent[child]][:, None] * len(outputs) + np.arange(len(outputs))
        steps = sparse.csr_matrix(
            (delta.ravel(), (np.repeat(child, len(outputs)), columns.ravel())),
            shape=(tree.node_count, total.shape[1]))
        total += (member.decision_path(_named(member, X)) @ steps).toarray()
    return (total / len(members)).reshape(len(X), forest.n_features, len(outputs))


def _named(member: Any, X: np.ndarray) -> Any:
    """Rows as the member expects them (a frame when fitted with names, to stay quiet)."""
    names = getattr(member, "feature_names_in_", None)
    if names is None:
        return X
    import pandas as pd

    return pd.DataFrame(X, columns=list(names))


def check_reason_columns(estimator: Any, forest: Forest, X: np.ndarray,
                         names: np.ndarray, credits: np.ndarray, expected_null: np.ndarray,
                         predicted: np.ndarray | None, tolerance: np.ndarray) -> ReasonVerdict:
    """Compare per row the SQL's K (name, credit) pairs with the reference.

    `names` (object) and `credits` (float, NaN for NULL) are (rows, K); `predicted` holds
    the library's labels (used for multiclass, whose credits explain the predicted class);
    `tolerance` is the allowed difference per row.
    """
    verdict = ReasonVerdict()
    used = forest.used_features()
    position = {forest.feature_names[f]: i for i, f in enumerate(used)}
    keep = np.flatnonzero(~expected_null)
    sql_null = np.array([[v is None for v in row] for row in names.tolist()], dtype=bool) \
        & np.isnan(credits)
    verdict.disagreements += int((~sql_null[expected_null].all(axis=1)).sum())
    reference = reference_credits(estimator, forest, X[keep])[:, used, :]
    if reference.shape[2] > 1:  # multiclass: the predicted class's credits
        index = {c: k for k, c in enumerate(forest.classes)}
        pick = np.array([index[label] for label in predicted[keep].tolist()])
        reference = reference[np.arange(len(keep)), :, pick]
    else:
        reference = reference[:, :, 0]
    for row, ref in zip(keep.tolist(), reference, strict=True):
        bad, tie = _check_row(ref, names[row].tolist(), credits[row], position,
                              float(tolerance[row]), verdict)
        verdict.disagreements += bad
        verdict.ties += tie
    return verdict


def _check_row(ref: np.ndarray, names: list[Any], credits: np.ndarray,
               position: dict[str, int], tolerance: float,
               verdict: ReasonVerdict) -> tuple[int, int]:
    """(1, 0) disagreement, (0, 1) tie, (0, 0) exact agreement."""
    order = sorted(range(len(ref)), key=lambda i: (-abs(ref[i]), i))
    if len(set(names)) != len(names) or any(n not in position for n in names):
        return 1, 0
    tie = 0
    for k, (name, credit) in enumerate(zip(names, credits.tolist(), strict=True)):
        i = position[name]
        diff = abs(credit - ref[i])
        verdict.max_abs_diff = max(verdict.max_abs_diff, diff)
        if not diff <= tolerance:
            return 1, 0
        if i != order[k]:
            if abs(abs(ref[i]) - abs(ref[order[k]])) > tolerance:
                return 1, 0
            tie = 1
    return 0, tie
