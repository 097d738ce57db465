"""Read a model file safely.

skops files are loaded with an allow-list of scikit-learn types. Pickle and joblib files
can run arbitrary code while loading, so they load only when the user says so. XGBoost
JSON models and LightGBM text models or JSON dumps are data, recognised by their content
(not their extension) and wrapped in adapters the boosting readers dispatch on.
"""

from __future__ import annotations

import json
import zipfile
from pathlib import Path
from typing import Any

from tree2sql.errors import UserError, existing_file

# Types a skops file may hold beyond those skops trusts by default: tree internals that
# scikit-learn stores as extension types. Anything else is refused by name.
SKOPS_ALLOWED_TYPES = frozenset({
    "sklearn.tree._tree.Tree",
    "sklearn._loss.link.IdentityLink",
    "sklearn._loss.link.LogitLink",
    "sklearn._loss.link.MultinomialLogit",
    "sklearn._loss.loss.HalfBinomialLoss",
    "sklearn._loss.loss.HalfMultinomialLoss",
    "sklearn._loss.loss.HalfSquaredError",
    "sklearn.ensemble._hist_gradient_boosting.predictor.TreePredictor",
    "sklearn.ensemble._hist_gradient_boosting.binning._BinMapper",
    "collections.OrderedDict",
    # Pipelines: encoders keep their output dtype and imputers their fit dtype as numpy
    # dtype objects (data, not code).
    "numpy.dtype",
})

ZIP_MAGIC = b"PK\x03\x04"  # a skops file is a zip archive; this opens its first entry
HEAD_BYTES = 64  # enough to tell JSON and LightGBM's text model from pickle bytes
JSON_FIX = ("give an XGBoost model saved with save_model('model.json'), a LightGBM text "
            "model (save_model('model.txt')) or its dump_model() JSON, or a skops file")

PICKLE_FIX = (
    "pickle and joblib files can run code when loaded. If you trust this file, pass "
    "--allow-pickle; better, save the model as skops: "
    "skops.io.dump(model, 'model.skops')"
)


def load_model(path: str | Path, *, allow_pickle: bool = False) -> Any:
    """Return the estimator stored in `path` (skops, or pickle/joblib when allowed)."""
    path = existing_file(path, "model", "give the path of a model saved with skops.io.dump",
                         "save the model again")
    if zipfile.is_zipfile(path):
        return _load_skops(path)
    with path.open("rb") as handle:
        head = handle.read(HEAD_BYTES)
    if head.startswith(ZIP_MAGIC):  # a zip archive missing its end
        raise UserError(f"skops file {str(path)!r} is damaged or truncated",
                        "copy or save the model again (skops.io.dump)")
    booster = _load_booster(path, head)
    if booster is not None:
        return booster
    if not allow_pickle:
        raise UserError(f"{str(path)!r} is not a skops file; it looks like a pickle or "
                        "joblib file", PICKLE_FIX)
    return _load_pickle(path)


def _load_skops(path: Path) -> Any:
    import skops.io

    try:
        untrusted = skops.io.get_untrusted_types(file=path)
    except Exception as exc:  # skops raises several types for a damaged archive
        raise UserError(f"cannot read skops file {str(path)!r}: {exc}",
                        "check that the file is complete; save the model again") from exc
    refused = sorted(set(untrusted) - SKOPS_ALLOWED_TYPES)
    if refused:
        raise UserError(
            f"skops file {str(path)!r} holds types tree2sql does not load: "
            + ", ".join(refused),
            "save only a supported scikit-learn tree model (see `tree2sql compile --help`)",
        )
    try:
        return skops.io.load(path, trusted=list(untrusted))
    except Exception as exc:
        raise UserError(f"cannot load skops file {str(path)!r}: {exc}",
                        "check that the file is complete; save the model again") from exc


def _load_pickle(path: Path) -> Any:
    import joblib

    try:
        return joblib.load(path)
    except Exception as exc:  # unpickling can raise anything (zlib.error, MemoryError, ...)
        raise UserError(f"cannot load {str(path)!r} as pickle/joblib: {exc}",
                        "check that the file is a complete model file") from exc


def _load_booster(path: Path, head: bytes) -> Any:
    """An XGBoost or LightGBM adapter when the file's content is one of theirs, else None."""
    from tree2sql.ingest import lightgbm_json, xgboost_json

    if head.replace(b"\r\n", b"\n").startswith(lightgbm_json.TEXT_MAGIC):
        return lightgbm_json.load_lightgbm_text(path)
    if not head.lstrip().startswith(b"{"):
        return None
    try:
        document = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(f"{str(path)!r} is not a JSON model file: {exc}", JSON_FIX) from None
    if xgboost_json.is_xgboost_json(document):
        return xgboost_json.load_xgboost_json(path, document)
    if lightgbm_json.is_lightgbm_dump(document):
        return lightgbm_json.load_lightgbm_dump(path, document)
    raise UserError(f"{str(path)!r} is JSON but neither an XGBoost model nor a LightGBM "
                    "dump", JSON_FIX)
