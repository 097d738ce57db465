"""XGBoost boosters from the JSON file `Booster.save_model("m.json")` writes.

XGBoost reads X as float32 and sends a row left when `float32(x) < split_condition`
(a float32), a missing value along the node's `default_left`. Leaf values are float32 and
the library sums them onto the base margin in float32, in tree order; the SQL sums the same
values in float64. So the reference (see `XGBoostModel.predict_proba`) is the library's own
routing, `Booster.predict(pred_leaf=True)`, summed in float64 in tree order: every split is
checked against the library exactly, and the sum is the one the SQL makes. The library's own
float32 predictions stay available (`library_predict`) and differ from it only by float32
rounding (a few float32 ulps of the margin).

The base margin comes from the library too: the same model with every leaf set to zero
predicts exactly its base margin (XGBoost 3 stores base_score in the output space, e.g. a
probability for binary:logistic, and converts it to a margin in float32 when it loads).
"""

from __future__ import annotations

import copy
import json
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from tree2sql.errors import UserError
from tree2sql.forest import LEAF, Aggregation, Comparison, Forest, Link, Task, Tree
from tree2sql.ingest import reads
from tree2sql.ingest.boosters import apply_link, first_max_labels, require

# objective name -> (task, link); everything else is refused by name.
OBJECTIVES = {
    "reg:squarederror": (Task.REGRESSION, Link.IDENTITY),
    "reg:squaredlogerror": (Task.REGRESSION, Link.IDENTITY),
    "reg:pseudohubererror": (Task.REGRESSION, Link.IDENTITY),
    "reg:absoluteerror": (Task.REGRESSION, Link.IDENTITY),
    "count:poisson": (Task.REGRESSION, Link.EXP),
    "reg:gamma": (Task.REGRESSION, Link.EXP),
    "reg:tweedie": (Task.REGRESSION, Link.EXP),
    "binary:logistic": (Task.CLASSIFICATION, Link.SIGMOID),
    "multi:softprob": (Task.CLASSIFICATION, Link.SOFTMAX),
    "multi:softmax": (Task.CLASSIFICATION, Link.SOFTMAX),
}
SAVE_FIX = "save the booster as JSON: booster.save_model('model.json')"


def is_xgboost_json(document: Any) -> bool:
    return isinstance(document, dict) and isinstance(document.get("learner"), dict)


class XGBoostModel:
    """An XGBoost booster read from its JSON file, with the parsed document beside it."""

    def __init__(self, document: dict, path: str = "") -> None:
        self.path = path
        self.document = document
        try:  # refuses what cannot compile before the library sees the file
            forest = _read_document(document, path)
        except (KeyError, TypeError, ValueError, AttributeError, IndexError) as exc:
            raise UserError(f"XGBoost model {path!r} is malformed ({exc!r})", SAVE_FIX) from None
        xgb = require("xgboost", "xgboost", f"XGBoost model {path!r}")
        self.booster = _booster(xgb, document, path)
        self.booster.set_param({"nthread": 1})
        initial = _base_margin(xgb, document, path)
        if len(initial) != forest.n_raw:
            initial = initial[:1] * forest.n_raw
        self.forest = replace(forest, aggregation=replace(forest.aggregation, initial=initial))

    def _matrix(self, rows: np.ndarray) -> Any:
        import xgboost

        return xgboost.DMatrix(np.asarray(rows, dtype=np.float64), missing=np.nan, nthread=1)

    def apply(self, rows: np.ndarray) -> np.ndarray:
        """The library's leaf (node id) per row and tree."""
        leaves = self.booster.predict(self._matrix(rows), pred_leaf=True,
                                      validate_features=False)
        return np.asarray(leaves, dtype=np.int64).reshape(len(rows), -1)

    def raw(self, rows: np.ndarray) -> np.ndarray:
        """Base margins plus the library's leaves' values, summed in float64 in tree order."""
        forest, leaves = self.forest, self.apply(rows)
        raw = np.tile(np.asarray(forest.aggregation.initial), (len(rows), 1))
        for t, tree in enumerate(forest.trees):
            raw[:, forest.aggregation.tree_output[t]] += tree.value[leaves[:, t], 0]
        return raw

    def predict_proba(self, rows: np.ndarray) -> np.ndarray:
        return apply_link(self.raw(rows), self.forest.aggregation.link)

    def predict(self, rows: np.ndarray) -> np.ndarray:
        """Values, or labels by the library's rule: p > 0.5 (raw > 0) for binary, argmax."""
        if not self.forest.is_classifier:
            return apply_link(self.raw(rows), self.forest.aggregation.link)[:, 0]
        raw = self.raw(rows)
        if raw.shape[1] == 1:
            return np.where(raw[:, 0] > 0, self.forest.classes[1], self.forest.classes[0])
        return first_max_labels(raw, self.forest.classes)

    def library_predict(self, rows: np.ndarray, output_margin: bool = False) -> np.ndarray:
        """XGBoost's own float32 predictions (probability of class 1, class probabilities,
        values; or the margins), for checking the float64 reference against them."""
        predicted = self.booster.predict(self._matrix(rows), output_margin=output_margin,
                                         validate_features=False)
        return np.asarray(predicted, dtype=np.float64)


def load_xgboost_json(path: Path, document: dict) -> XGBoostModel:
    return XGBoostModel(document, str(path))


def _booster(xgb: Any, document: dict, path: str) -> Any:
    booster = xgb.Booster()
    try:
        booster.load_model(bytearray(json.dumps(document).encode()))
    except xgb.core.XGBoostError as exc:
        raise UserError(f"XGBoost cannot load {path!r}: {str(exc).splitlines()[0]}",
                        SAVE_FIX) from None
    return booster


def _base_margin(xgb: Any, document: dict, path: str) -> tuple[float, ...]:
    """The margin each output starts from, as the library computes it (leaves zeroed)."""
    zeroed = copy.deepcopy(document)
    for tree in _trees(zeroed, path):
        left = tree.get("left_children", [])
        tree["split_conditions"] = [0.0 if child == -1 else value for child, value
                                    in zip(left, tree.get("split_conditions", []), strict=True)]
    booster = _booster(xgb, zeroed, path)
    n_features = int(booster.num_features())
    row = xgb.DMatrix(np.full((1, max(n_features, 1)), np.nan), missing=np.nan, nthread=1)
    margin = booster.predict(row, output_margin=True, validate_features=False)
    return tuple(float(m) for m in np.asarray(margin, dtype=np.float64).reshape(-1))


def _trees(document: dict, path: str) -> list[dict]:
    booster = document["learner"].get("gradient_booster", {})
    name = booster.get("name")
    if name != "gbtree":
        raise UserError(f"XGBoost model {path!r} uses booster {name!r}",
                        "tree2sql compiles booster='gbtree' models (not dart or gblinear)")
    return booster.get("model", {}).get("trees", [])


@reads("XGBoostModel")
def read_xgboost(model: XGBoostModel) -> Forest:
    return model.forest


def _read_document(document: dict, path: str) -> Forest:
    """The forest, its initial margins left at zero (the library supplies them)."""
    learner = document["learner"]
    objective = learner.get("objective", {}).get("name", "")
    if objective not in OBJECTIVES:
        raise UserError(f"XGBoost model {path!r} has objective {objective!r}, which "
                        "tree2sql cannot write in SQL",
                        "supported objectives: " + ", ".join(sorted(OBJECTIVES)))
    task, link = OBJECTIVES[objective]
    params = learner.get("learner_model_param", {})
    if int(params.get("num_target", "1")) > 1:
        raise UserError(f"XGBoost model {path!r} predicts several targets",
                        "train one model per target")
    raw_trees = _trees(document, path)
    if not raw_trees:
        raise UserError(f"XGBoost model {path!r} has no trees", "train before saving")
    model = learner["gradient_booster"]["model"]
    owner = tuple(int(k) for k in model.get("tree_info", [0] * len(raw_trees)))
    n_raw = max(int(params.get("num_class", "0")), 1)
    if any(not 0 <= k < n_raw for k in owner) or len(owner) != len(raw_trees):
        raise UserError(f"XGBoost model {path!r} assigns trees to outputs it does not have",
                        SAVE_FIX)
    n_features = int(params.get("num_feature", "0"))
    names = tuple(learner.get("feature_names") or (f"f{i}" for i in range(n_features)))
    trees = tuple(_read_tree(tree, path, index) for index, tree in enumerate(raw_trees))
    classes = tuple(range(max(n_raw, 2))) if task is Task.CLASSIFICATION else None
    return Forest(
        task=task,
        trees=trees,
        feature_names=names,
        comparison=Comparison.FLOAT32_LT,
        accepts_missing=True,
        classes=classes,
        source=f"XGBoost {objective} ({len(trees)} trees)",
        refuses_float32_overflow=True,  # DMatrix refuses inf and values beyond float32
        aggregation=Aggregation(mean=False, initial=(0.0,) * n_raw, link=link,
                                tree_output=owner,
                                positive_from_zero=False),
    )


def _read_tree(tree: dict, path: str, index: int) -> Tree:
    if int(tree.get("tree_param", {}).get("size_leaf_vector", "1")) > 1:
        raise UserError(f"XGBoost model {path!r} has vector leaves (tree {index})",
                        "train with multi_strategy='one_output_per_tree'")
    if any(int(kind) != 0 for kind in tree.get("split_type", [])):
        raise UserError(f"XGBoost model {path!r} has categorical splits (tree {index}), "
                        "which tree2sql does not compile yet",
                        "train without enable_categorical, with the categories as numbers")
    left = np.asarray(tree["left_children"], dtype=np.int64)
    leaf = left == -1
    condition = np.asarray(tree["split_conditions"], dtype=np.float32).astype(np.float64)
    return Tree(
        feature=np.where(leaf, 0, np.asarray(tree["split_indices"], dtype=np.int64)),
        threshold=np.where(leaf, 0.0, condition),
        left=np.where(leaf, LEAF, left),
        right=np.where(leaf, LEAF, np.asarray(tree["right_children"], dtype=np.int64)),
        missing_left=np.asarray(tree["default_left"], dtype=bool),
        value=np.ascontiguousarray(np.where(leaf, condition, 0.0)[:, None]),
    )
