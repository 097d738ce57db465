"""What XGBoost and LightGBM readers share: the optional import and the link arithmetic.

Both libraries are optional, so they are imported only when a model file of theirs is
read. A booster file has no estimator class of its own, so loading wraps it in a small
adapter (see `xgboost_json`, `lightgbm_json`) that `ingest` dispatches on and that answers
`predict` / `predict_proba` / `apply` the way `tree2sql.reference` asks a scikit-learn model.
"""

from __future__ import annotations

import importlib
from typing import Any

import numpy as np

from tree2sql.errors import UserError
from tree2sql.forest import Forest, Link
from tree2sql.ingest import reads

# In-memory objects of either library, each with the file its own API writes.
SAVE_AS = {"xgboost": "save_model('model.json')", "lightgbm": "save_model('model.txt')"}


def require(module: str, package: str, what: str) -> Any:
    """Import `module` or say which package to install; `what` names the file being read."""
    try:
        return importlib.import_module(module)
    except ImportError:
        raise UserError(f"reading {what} needs the {package} package, which is not installed",
                        f"pip install {package}   (or: pip install 'tree2sql[boosters]')"
                        ) from None


def apply_link(raw: np.ndarray, link: Link) -> np.ndarray:
    """Outputs from summed raw scores (rows, n_raw), in float64 as the SQL computes them:
    sigmoid gives (1 - p, p), softmax exp(raw - max) / sum."""
    if link is Link.SIGMOID:
        p = 1.0 / (1.0 + np.exp(-raw[:, 0]))
        return np.column_stack([1.0 - p, p])
    if link is Link.SOFTMAX:
        e = np.exp(raw - raw.max(axis=1, keepdims=True))
        return e / e.sum(axis=1, keepdims=True)
    if link is Link.EXP:
        return np.exp(raw)
    return raw


def first_max_labels(proba: np.ndarray, classes: tuple) -> np.ndarray:
    """The first class with the largest probability (numpy argmax), as an object array."""
    return np.array(classes, dtype=object)[np.argmax(proba, axis=1)]


@reads("Booster", "XGBClassifier", "XGBRegressor", "LGBMClassifier", "LGBMRegressor")
def read_library_object(estimator: Any) -> Forest:
    """A live booster is read through its saved file, whose numbers are the ones verified."""
    library = type(estimator).__module__.split(".")[0]
    if library not in SAVE_AS:
        raise UserError(f"tree2sql cannot compile a {type(estimator).__name__} from "
                        f"{library}", "give an XGBoost, LightGBM or scikit-learn tree model")
    raise UserError(f"tree2sql reads {library} models from their saved files, not from a "
                    f"live {type(estimator).__name__}",
                    f"call .{SAVE_AS[library]} and load it with tree2sql.loading.load_model "
                    "(or pass the file to the command line)")
