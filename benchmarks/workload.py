"""The benchmark workload: seeded synthetic rows and the forests trained on them.

Rows come from scikit-learn's `make_classification` with a fixed seed plus 1% missing
values, so the trained trees route missing values too. Forests are cached in the work
directory by their parameters, since training dominates a quick run otherwise.
"""

from __future__ import annotations

import pickle
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import numpy as np

MISSING_SHARE = 0.01
SEED = 20260101


@dataclass(frozen=True)
class Workload:
    rows: int = 1_000_000
    features: int = 20
    trees: int = 100
    max_depth: int | None = 12  # None: fully grown
    train_rows: int = 20_000

    @property
    def label(self) -> str:
        depth = "grown" if self.max_depth is None else f"depth{self.max_depth}"
        return f"{self.trees}trees-{depth}-{self.features}f"

    def describe(self) -> dict[str, Any]:
        return {**asdict(self), "label": self.label}


def make_rows(n: int, features: int, seed: int = SEED) -> tuple[np.ndarray, np.ndarray]:
    """(X, y): X float64 with NaN for missing values; the same for the same arguments."""
    from sklearn.datasets import make_classification

    X, y = make_classification(n_samples=n, n_features=features,
                               n_informative=max(2, features // 2), n_redundant=2,
                               n_classes=2, flip_y=0.05, random_state=seed)
    rng = np.random.default_rng(seed)
    X[rng.random(X.shape) < MISSING_SHARE] = np.nan
    return X, y


def trained_forest(workload: Workload, workdir: Path) -> Any:
    """The random forest for `workload`, trained once and cached as a pickle in `workdir`.

    Pickle is fine here: the file is written and read by this benchmark only.
    """
    from sklearn.ensemble import RandomForestClassifier

    path = workdir / f"forest-{workload.label}-{workload.train_rows}.pickle"
    if path.is_file():
        with path.open("rb") as handle:
            return pickle.load(handle)
    X, y = make_rows(workload.train_rows, workload.features, SEED + 1)
    model = RandomForestClassifier(n_estimators=workload.trees, max_depth=workload.max_depth,
                                   random_state=SEED, n_jobs=-1)
    model.fit(X, y)
    workdir.mkdir(parents=True, exist_ok=True)
    with path.open("wb") as handle:
        pickle.dump(model, handle)
    return model
