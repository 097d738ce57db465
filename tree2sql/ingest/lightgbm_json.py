"""LightGBM boosters: the text model file `Booster.save_model` writes, or the JSON of
`Booster.dump_model()`.

LightGBM reads X as float64 and applies, per node (its tree.h NumericalDecision): a NaN
becomes 0.0 unless the node's missing_type is NaN; then a missing value (NaN for
missing_type NaN, a value in [-kZeroThreshold, kZeroThreshold] for missing_type Zero) goes
along default_left; any other value goes left when `x <= threshold`. Its dense-matrix
predictor also drops values with |x| <= kZeroThreshold, which then read as 0.0. Each node
is rewritten here into float64 `x <= bound` tests with a NaN direction that give the same
answer for every double (a missing_type Zero node whose default side is not where the
zero band lies becomes a short chain, its subtrees copied). Leaf values are float64 and the
library sums them in tree order in float64, as the SQL does, so its own predictions are the
reference. LightGBM cannot load its JSON dump: such a file compiles, and verifying asks for
the text model file instead.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from tree2sql.errors import UserError
from tree2sql.forest import LEAF, Aggregation, Comparison, Forest, Link, Task, Tree
from tree2sql.ingest import reads
from tree2sql.ingest.boosters import first_max_labels, require

K_ZERO = float(np.float32(1e-35))  # LightGBM's kZeroThreshold: the float 1e-35f as a double
BELOW_ZERO_BAND = math.nextafter(-K_ZERO, -math.inf)
MAX_NODES = 2_000_000  # copies made for missing_type Zero chains stop here
TEXT_MAGIC = b"tree\n"  # first line of LightGBM's text model file

# objective (first word of the model's objective line) -> (task, link)
OBJECTIVES = {
    "regression": (Task.REGRESSION, Link.IDENTITY),
    "regression_l1": (Task.REGRESSION, Link.IDENTITY),
    "huber": (Task.REGRESSION, Link.IDENTITY),
    "fair": (Task.REGRESSION, Link.IDENTITY),
    "quantile": (Task.REGRESSION, Link.IDENTITY),
    "mape": (Task.REGRESSION, Link.IDENTITY),
    "poisson": (Task.REGRESSION, Link.EXP),
    "gamma": (Task.REGRESSION, Link.EXP),
    "tweedie": (Task.REGRESSION, Link.EXP),
    "binary": (Task.CLASSIFICATION, Link.SIGMOID),
    "multiclass": (Task.CLASSIFICATION, Link.SOFTMAX),
}
TEXT_FIX = ("give the text model file LightGBM writes with booster.save_model('model.txt'); "
            "LightGBM cannot load its JSON dump, so it cannot be the reference for one")


def is_lightgbm_dump(document: Any) -> bool:
    return isinstance(document, dict) and isinstance(document.get("tree_info"), list)


class LightGBMModel:
    """A LightGBM model: its dump, and the Booster when it came from a text model file."""

    def __init__(self, dump: dict, booster: Any = None, path: str = "") -> None:
        self.dump, self.booster, self.path = dump, booster, path
        try:
            self.forest, self.leaf_nodes = _read_dump(dump, path)
        except (KeyError, TypeError, ValueError, AttributeError, IndexError) as exc:
            raise UserError(f"LightGBM model {path!r} is malformed ({exc!r})",
                            "save the model again with booster.save_model('model.txt')"
                            ) from None

    def _library(self) -> Any:
        if self.booster is None:
            raise UserError(f"{self.path!r} is a LightGBM JSON dump, which LightGBM cannot "
                            "load to predict the rows it is verified on", TEXT_FIX)
        return self.booster

    def _predict(self, rows: np.ndarray, **kind: Any) -> np.ndarray:
        return np.asarray(self._library().predict(np.asarray(rows, dtype=np.float64),
                                                  num_threads=1, **kind), dtype=np.float64)

    def predict_proba(self, rows: np.ndarray) -> np.ndarray:
        p = self._predict(rows)
        return np.column_stack([1.0 - p, p]) if p.ndim == 1 else p

    def predict(self, rows: np.ndarray) -> np.ndarray:
        """Values, or the first class with the largest probability (LGBMClassifier)."""
        if not self.forest.is_classifier:
            return self._predict(rows)
        return first_max_labels(self.predict_proba(rows), self.forest.classes)

    def apply(self, rows: np.ndarray) -> np.ndarray:
        """The library's leaves as node ids of the ingested trees."""
        leaves = self._predict(rows, pred_leaf=True).astype(np.int64).reshape(len(rows), -1)
        return np.column_stack([self.leaf_nodes[t][leaves[:, t]]
                                for t in range(leaves.shape[1])])


def load_lightgbm_text(path: Path) -> LightGBMModel:
    lgb = require("lightgbm", "lightgbm", f"LightGBM model {str(path)!r}")
    try:
        booster = lgb.Booster(model_file=str(path))
    except lgb.basic.LightGBMError as exc:
        raise UserError(f"LightGBM cannot load {str(path)!r}: {str(exc).splitlines()[0]}",
                        "save the model again with booster.save_model('model.txt')") from None
    return LightGBMModel(booster.dump_model(), booster, str(path))


def load_lightgbm_dump(path: Path, document: dict) -> LightGBMModel:
    return LightGBMModel(document, None, str(path))


@reads("LightGBMModel")
def read_lightgbm(model: LightGBMModel) -> Forest:
    return model.forest


def _read_dump(dump: dict, path: str) -> tuple[Forest, list[np.ndarray]]:
    objective = str(dump.get("objective", "")).split(" ")[0]
    if objective not in OBJECTIVES:
        raise UserError(f"LightGBM model {path!r} has objective {objective!r}, which "
                        "tree2sql cannot write in SQL",
                        "supported objectives: " + ", ".join(sorted(OBJECTIVES)))
    task, link = OBJECTIVES[objective]
    sigmoid = _objective_parameter(dump, "sigmoid", 1.0)
    if link is Link.SIGMOID and sigmoid != 1.0:
        raise UserError(f"LightGBM model {path!r} uses sigmoid:{sigmoid:g}",
                        "train with the default sigmoid=1.0")
    if dump.get("average_output"):
        raise UserError(f"LightGBM model {path!r} averages its trees (boosting='rf')",
                        "tree2sql compiles boosted trees (boosting='gbdt' or 'goss')")
    per_iteration = int(dump.get("num_tree_per_iteration", 1))
    names = tuple(str(n) for n in dump.get("feature_names", []))
    trees, leaf_nodes = [], []
    for index, info in enumerate(dump["tree_info"]):
        tree, leaves = _read_tree(info["tree_structure"], path, index)
        trees.append(tree)
        leaf_nodes.append(leaves)
    if not trees:
        raise UserError(f"LightGBM model {path!r} has no trees", "train before saving")
    n_classes = int(dump.get("num_class", 1))
    forest = Forest(
        task=task,
        trees=tuple(trees),
        feature_names=names,
        comparison=Comparison.FLOAT64_LE,
        accepts_missing=True,
        classes=tuple(range(max(n_classes, 2))) if task is Task.CLASSIFICATION else None,
        source=f"LightGBM {objective} ({len(trees)} trees)",
        refuses_float32_overflow=False,  # reads float64, infinities included
        aggregation=Aggregation(mean=False, initial=(0.0,) * per_iteration, link=link,
                                tree_output=tuple(t % per_iteration for t in range(len(trees))),
                                positive_from_zero=False),
    )
    return forest, leaf_nodes


def _objective_parameter(dump: dict, name: str, default: float) -> float:
    for word in str(dump.get("objective", "")).split(" ")[1:]:
        key, _, value = word.partition(":")
        if key == name:
            return float(value)
    return default


class _Builder:
    """Appends nodes in preorder; rewrites LightGBM's decisions into `x <= bound` tests."""

    def __init__(self, path: str, index: int) -> None:
        self.path, self.index = path, index
        self.feature: list[int] = []
        self.threshold: list[float] = []
        self.left: list[int] = []
        self.right: list[int] = []
        self.missing_left: list[bool] = []
        self.value: list[float] = []
        self.leaf_node: dict[int, int] = {}

    def _new(self) -> int:
        if len(self.feature) >= MAX_NODES:
            raise UserError(f"LightGBM model {self.path!r}: tree {self.index} grows past "
                            f"{MAX_NODES} nodes when its zero-as-missing splits are written "
                            "as comparisons", "train without zero_as_missing=True")
        self.feature.append(0)
        self.left.append(LEAF)
        self.right.append(LEAF)
        self.threshold.append(0.0)
        self.missing_left.append(False)
        self.value.append(0.0)
        return len(self.feature) - 1

    def split(self, feature: int, bound: float, missing_left: bool, left: Any,
              right: Any) -> int:
        """A node `x <= bound`; `left` / `right` build the children (callables)."""
        node = self._new()
        self.feature[node], self.threshold[node] = feature, bound
        self.missing_left[node] = missing_left
        self.left[node] = left()
        self.right[node] = right()
        return node

    def build(self, entry: dict) -> int:
        if "split_feature" not in entry:
            node = self._new()
            self.value[node] = float(entry["leaf_value"])
            self.leaf_node.setdefault(int(entry.get("leaf_index", 0)), node)
            return node
        if entry.get("decision_type") != "<=":
            raise UserError(f"LightGBM model {self.path!r} has categorical splits (tree "
                            f"{self.index}), which tree2sql does not compile yet",
                            "train with the categories as numeric features "
                            "(categorical_feature=[])")
        f, t = int(entry["split_feature"]), float(entry["threshold"])
        kind, default_left = entry.get("missing_type", "None"), bool(entry["default_left"])
        left = lambda: self.build(entry["left_child"])  # noqa: E731
        right = lambda: self.build(entry["right_child"])  # noqa: E731
        if kind not in ("None", "Zero", "NaN"):
            raise UserError(f"LightGBM model {self.path!r} has missing_type {kind!r}",
                            "save the model again with LightGBM 4")
        if kind != "Zero":
            # Values in the zero band read as 0.0: only a threshold inside it moves.
            bound = t
            if -K_ZERO <= t < K_ZERO:
                bound = K_ZERO if t >= 0.0 else BELOW_ZERO_BAND
            nan_left = default_left if kind == "NaN" else t >= 0.0
            return self.split(f, bound, nan_left, left, right)
        # missing_type Zero: the band [-K_ZERO, K_ZERO] and NaN go the default way.
        if -K_ZERO <= t < K_ZERO:
            return self.split(f, K_ZERO if default_left else BELOW_ZERO_BAND, default_left,
                              left, right)
        band_on_threshold_side = (t >= K_ZERO) == default_left
        if band_on_threshold_side:
            return self.split(f, t, default_left, left, right)
        if t >= K_ZERO:  # default right: left iff x < -K_ZERO or K_ZERO < x <= t
            return self.split(f, BELOW_ZERO_BAND, False, left, lambda: self.split(
                f, K_ZERO, True, right, lambda: self.split(f, t, False, left, right)))
        # t < -K_ZERO, default left: left iff x <= t or x in the band
        return self.split(f, t, False, left, lambda: self.split(
            f, BELOW_ZERO_BAND, False, right, lambda: self.split(f, K_ZERO, True, left, right)))


def _read_tree(structure: dict, path: str, index: int) -> tuple[Tree, np.ndarray]:
    builder = _Builder(path, index)
    try:
        builder.build(structure)
    except RecursionError:
        raise UserError(f"LightGBM model {path!r}: tree {index} is too deep to read",
                        "train with max_depth set (e.g. max_depth=30)") from None
    except (KeyError, TypeError, ValueError) as exc:
        raise UserError(f"LightGBM model {path!r}: tree {index} is malformed ({exc!r})",
                        "save the model again with booster.save_model('model.txt')") from None
    leaf_nodes = np.zeros(max(builder.leaf_node, default=0) + 1, dtype=np.int64)
    for leaf, node in builder.leaf_node.items():
        leaf_nodes[leaf] = node
    tree = Tree(
        feature=np.asarray(builder.feature, dtype=np.int64),
        threshold=np.asarray(builder.threshold, dtype=np.float64),
        left=np.asarray(builder.left, dtype=np.int64),
        right=np.asarray(builder.right, dtype=np.int64),
        missing_left=np.asarray(builder.missing_left, dtype=bool),
        value=np.asarray(builder.value, dtype=np.float64)[:, None],
    )
    return tree, leaf_nodes

