"""The training reference that monitoring compares today's rows with.

Captured once, in Python, from the training rows and the model itself: per numeric input
and per score, bin edges at the training deciles, the training share of rows in each bin,
the share of missing values and the training range. Stored as JSON (in the deployment
manifest, or in a file) so that the monitoring SQL can be written without the training
rows at hand.

Bin convention, the same here and in the SQL (tree2sql.monitor_sql): with edges
e_1 < e_2 < ... < e_k, bin 1 holds x <= e_1, bin i holds e_(i-1) < x <= e_i, and bin k+1
holds x > e_k. NULL and NaN are "missing", a bin of their own (bin 0) in the PSI, so a
rise in missing values counts as drift too.

The monitored score: a binary classifier's probability of its second class (the one
scikit-learn treats as positive), each class's probability for a multiclass model, a
regressor's predicted value, an anomaly model's score_samples.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from tree2sql.compiler import Combine, feature_columns, score_column_names
from tree2sql.errors import UserError, existing_file
from tree2sql.forest import Forest, Task
from tree2sql.manifest import now

FORMAT = "tree2sql monitoring reference 1"
# Deciles: ten bins of about equal training share, the common practice for PSI.
QUANTILES = tuple(round(0.1 * i, 1) for i in range(1, 10))
BIN_RULE = ("bin 0: missing (NULL or NaN); bin 1: x <= edges[0]; bin i: edges[i-2] < x <= "
            "edges[i-1]; last bin: x > edges[-1]; shares are of all rows")


@dataclass
class Binned:
    """One monitored quantity: an input column or a score."""

    kind: str  # "feature" or "score"
    name: str  # the model's input name, or the score's name (prob_<label>, value)
    edges: list[float]
    shares: list[float]  # bins 1 .. len(edges)+1, as shares of all rows
    missing_share: float
    min: float | None  # training range of the finite values
    max: float | None
    output: int | None = None  # scores: the model output (class position) it reads
    text: bool = False  # a text input: only its missing share is monitored


@dataclass
class MonitorReference:
    fingerprint: str
    model: str
    rows: int
    items: list[Binned]
    created_at: str = field(default_factory=now)
    quantiles: tuple[float, ...] = QUANTILES
    bins: str = BIN_RULE
    format: str = FORMAT

    def to_json(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_json(cls, data: Any, where: str) -> MonitorReference:
        if not isinstance(data, dict) or data.get("format") != FORMAT:
            raise UserError(f"{where} is not a tree2sql monitoring reference ({FORMAT})",
                            "make one with tree2sql monitor MODEL --reference-data TRAIN.csv "
                            "--save-reference REF.json")
        try:
            items = [_checked(Binned(**item)) for item in data["items"]]
            return cls(fingerprint=data["fingerprint"], model=data["model"],
                       rows=int(data["rows"]), items=items, created_at=data["created_at"],
                       quantiles=tuple(data["quantiles"]), bins=data["bins"])
        except (KeyError, TypeError, ValueError) as exc:
            raise UserError(f"{where} is a damaged monitoring reference ({exc})",
                            "build it again from the training rows") from exc

    def check_model(self, forest: Forest) -> None:
        """A reference belongs to one model: its scores' distribution came from it."""
        if self.fingerprint != forest.fingerprint():
            raise UserError("the monitoring reference was captured for another model "
                            f"(fingerprint {self.fingerprint[:12]}, this model "
                            f"{forest.fingerprint()[:12]})",
                            "give the model the reference was made with, or capture a new "
                            "reference from its training rows")


def _checked(item: Binned) -> Binned:
    """A stored item whose numbers are numbers: they become SQL literals."""
    numbers = [*item.edges, *item.shares, item.missing_share,
               *(v for v in (item.min, item.max) if v is not None)]
    if (item.kind not in ("feature", "score") or not isinstance(item.name, str)
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                       and math.isfinite(v) for v in numbers)
            or len(item.shares) != (0 if item.text else len(item.edges) + 1)
            or list(item.edges) != sorted(set(item.edges))
            or (item.kind == "score" and not isinstance(item.output, int))):
        raise ValueError(f"item {item.name!r} is not a valid binned quantity")
    return item


def bin_of(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Bin numbers by the module's rule: 0 for NaN, else 1 + edges strictly below x."""
    bins = np.searchsorted(edges, values, side="left") + 1
    return np.where(np.isnan(values), 0, bins)


def binned(kind: str, name: str, values: np.ndarray, output: int | None = None) -> Binned:
    """Edges at the deciles of the finite values (deduplicated), and the training shares."""
    values = np.asarray(values, dtype=np.float64)
    finite = values[np.isfinite(values)]
    edges = np.unique(np.quantile(finite, QUANTILES, method="inverted_cdf")) if finite.size \
        else np.empty(0)
    counts = np.bincount(bin_of(values, edges), minlength=len(edges) + 2)
    shares = counts / max(len(values), 1)
    return Binned(kind=kind, name=name, edges=[float(e) for e in edges],
                  shares=[float(s) for s in shares[1:]], missing_share=float(shares[0]),
                  min=float(finite.min()) if finite.size else None,
                  max=float(finite.max()) if finite.size else None, output=output)


def score_items(forest: Forest) -> list[tuple[str, int]]:
    """(name, model output) of the scores monitored, named like the SQL columns sans prefix."""
    names, _ = score_column_names(forest, "")
    if forest.task is Task.ANOMALY:
        return [(names[0], 0)]
    if not forest.is_classifier:
        return [(names[0], 0)]
    if len(names) == 2:
        return [(names[1], 1)]
    return [(name, k) for k, name in enumerate(names)]


def build_reference(estimator: Any, forest: Forest, path: str | Path,
                    columns: dict[str, str], combine: Combine = Combine.AVERAGE
                    ) -> MonitorReference:
    """The reference from training rows in a CSV/Parquet file (columns named as the table's)."""
    from tree2sql.reference import predict_reference, raw_frame
    from tree2sql.sources import load_file

    names = feature_columns(forest, columns)
    text = forest.inputs.text if forest.inputs is not None else (False,) * len(names)
    engine, table = load_file(path)
    try:
        present = {c.name for c in engine.columns(table)}
        missing = [c for c in names if c not in present]
        if missing:
            raise UserError(f"the reference data {str(path)!r} lacks the columns "
                            + ", ".join(map(repr, missing)),
                            "name its columns like the table scored (after any --column map)")
        raw = engine.query(f'SELECT * FROM "{table}"')
    finally:
        engine.close()
    cols = [_objects(raw[c]) if t else _floats(raw[c]) for c, t in zip(names, text, strict=True)]
    X = raw_frame(forest.inputs, cols) if forest.inputs is not None \
        else np.column_stack(cols) if cols else np.empty((len(raw[names[0]]), 0))
    items = []
    for name, values, is_text in zip(forest.input_names, cols, text, strict=True):
        if is_text:
            gone = np.array([v is None for v in values], dtype=bool)
            items.append(Binned("feature", name, [], [], float(gone.mean()), None, None,
                                text=True))
        else:
            items.append(binned("feature", name, values))
    ref = predict_reference(estimator, forest, X, combine)
    items += [binned("score", name, ref.values[:, k], output=k)
              for name, k in score_items(forest)]
    return MonitorReference(fingerprint=forest.fingerprint(), model=forest.source,
                            rows=len(X), items=items)


def _floats(column: Any) -> np.ndarray:
    from tree2sql.verify import _floats as floats

    return floats(column)


def _objects(column: Any) -> list[Any]:
    from tree2sql.verify import _objects as objects

    return objects(column)


def load_reference(estimator: Any, forest: Forest, path: Path, columns: dict[str, str],
                   combine: Combine = Combine.AVERAGE) -> MonitorReference:
    """A saved reference (.json), or one built from training rows (CSV/Parquet)."""
    if path.suffix.lower() != ".json":
        return build_reference(estimator, forest, path, columns, combine)
    path = existing_file(path, "reference", "give the JSON file --save-reference wrote",
                         "build the reference again")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (ValueError, UnicodeDecodeError) as exc:
        raise UserError(f"{str(path)!r} is not JSON ({exc})",
                        "give the file --save-reference wrote") from exc
    reference = MonitorReference.from_json(data, repr(str(path)))
    reference.check_model(forest)
    return reference
