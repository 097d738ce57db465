"""Read a model file safely.

skops files are loaded with an allow-list of scikit-learn types. Pickle and joblib files
can run arbitrary code while loading, so they load only when the user says so.
"""

from __future__ import annotations

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
        if handle.read(len(ZIP_MAGIC)) == ZIP_MAGIC:  # a zip archive missing its end
            raise UserError(f"skops file {str(path)!r} is damaged or truncated",
                            "copy or save the model again (skops.io.dump)")
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
