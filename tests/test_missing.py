"""SQL NULL and floating NaN are both missing values, routed the way scikit-learn routes NaN.

Rows get a real NULL or a real NaN ('NaN'::DOUBLE in DuckDB) in every feature, alone and
together. The reference is the estimator's own prediction for the row with NaN in place.
"""

from __future__ import annotations

import numpy as np
import pytest
from helpers import KEY, STRATEGIES, TABLE, assert_agrees, load_rows
from sklearn import datasets
from sklearn.ensemble import ExtraTreesClassifier, RandomForestClassifier, RandomForestRegressor
from sklearn.tree import DecisionTreeClassifier, ExtraTreeClassifier

from tree2sql.compiler import Combine, ScoringRequest
from tree2sql.engines import DuckDBEngine
from tree2sql.ingest import ingest
from tree2sql.verify import verify


def wine_with_gaps(share: float = 0.2):
    """wine (M. Forina et al., UCI ML repository) with a share of each feature set to NaN."""
    X, y = datasets.load_wine(return_X_y=True)
    X = X.copy()
    X[np.random.default_rng(5).random(X.shape) < share] = np.nan
    return X, y


def missing_rows(X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rows to score and where to put NULL vs NaN.

    Returns (values, null_mask, nan_mask): per feature, rows with only that feature NULL,
    only that feature NaN, a NULL/NaN mix over several features, and rows wholly missing.
    """
    n_features = X.shape[1]
    base = np.nan_to_num(X[:20], nan=1.0)
    blocks, nulls, nans = [], [], []
    for feature in range(n_features):
        for kind in ("null", "nan"):
            block = base.copy()
            mask = np.zeros_like(block, dtype=bool)
            mask[:, feature] = True
            blocks.append(block)
            nulls.append(mask if kind == "null" else np.zeros_like(mask))
            nans.append(mask if kind == "nan" else np.zeros_like(mask))
    rng = np.random.default_rng(9)
    mixed = rng.random((60, n_features))
    blocks.append(np.nan_to_num(X[rng.integers(0, len(X), 60)], nan=2.0))
    nulls.append(mixed < 0.2)
    nans.append((mixed >= 0.2) & (mixed < 0.4))
    every = np.zeros((2, n_features), dtype=bool)
    blocks.append(base[:2])
    nulls.append(np.vstack([~every[0], every[1]]))  # all NULL, then all NaN
    nans.append(np.vstack([every[0], ~every[1]]))
    clean = np.nan_to_num(X, nan=0.5)  # the fitted rows themselves, gaps filled
    blocks.append(clean)
    nulls.append(np.zeros_like(clean, dtype=bool))
    nans.append(np.isnan(X))  # the fitted gaps as NaN again
    return np.vstack(blocks), np.vstack(nulls), np.vstack(nans)


def verify_missing(estimator, strategy: str, combine: Combine = Combine.AVERAGE):
    """Load the rows with NULLs from Arrow and NaNs written by SQL; verify; return report."""
    X, y = wine_with_gaps()
    values, nulls, nans = missing_rows(X)
    forest = ingest(estimator)
    engine = DuckDBEngine()
    load_rows(engine, values, forest.feature_names, null_mask=nulls)
    for feature, name in enumerate(forest.feature_names):
        ids = ", ".join(map(str, np.flatnonzero(nans[:, feature]).tolist()))
        if ids:
            engine.execute(f"UPDATE {TABLE} SET \"{name}\" = 'NaN'::DOUBLE "
                           f"WHERE {KEY} IN ({ids})")
    first = forest.feature_names[0]
    stored = engine.query(f'SELECT COUNT(*) AS n FROM {TABLE} WHERE isnan("{first}")')
    assert int(stored["n"][0]) == nans[:, 0].sum() > 0  # real NaN, not NULL, in the table
    request = ScoringRequest(table=TABLE, keys=(KEY,), strategy=strategy, combine=combine)
    report = verify(estimator, forest, engine, request)
    engine.close()
    return report, nulls | nans


FIT_WITH_GAPS = {
    "tree": lambda: DecisionTreeClassifier(random_state=0),
    "forest": lambda: RandomForestClassifier(n_estimators=8, random_state=0),
    "extra": lambda: ExtraTreesClassifier(n_estimators=8, random_state=0),
    "regressor": lambda: RandomForestRegressor(n_estimators=6, max_depth=8, random_state=0),
}


@pytest.mark.parametrize("strategy", STRATEGIES)
@pytest.mark.parametrize("model", sorted(FIT_WITH_GAPS))
def test_model_fit_with_missing_values_routes_them(model, strategy):
    X, y = wine_with_gaps()
    estimator = FIT_WITH_GAPS[model]().fit(X, y)
    assert ingest(estimator).accepts_missing
    combines = [Combine.AVERAGE] if model == "regressor" else list(Combine)
    for combine in combines:
        report, missing = verify_missing(estimator, strategy, combine)
        assert_agrees(report)
        assert report.null_scores == report.null_missing == 0
        assert missing.any(axis=1).sum() > 100


def test_fit_with_missing_values_makes_missing_only_splits():
    """scikit-learn sets missing values apart with a +inf threshold: the case is exercised."""
    X, y = wine_with_gaps()
    estimator = FIT_WITH_GAPS["forest"]().fit(X, y)
    forest = ingest(estimator)
    internal = [t.threshold[~t.is_leaf()] for t in forest.trees]
    assert any(np.isposinf(t).any() for t in internal)
    assert any(t.missing_left[~t.is_leaf()].any() and (~t.missing_left[~t.is_leaf()]).any()
               for t in forest.trees)


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_model_fit_without_missing_values_still_routes_them(strategy):
    """A forest fit on complete rows still scores NaN (the library picks a side per split)."""
    X, y = datasets.load_wine(return_X_y=True)  # wine: Forina et al., UCI ML repository
    estimator = RandomForestClassifier(n_estimators=8, random_state=0).fit(X, y)
    assert ingest(estimator).accepts_missing
    report, _ = verify_missing(estimator, strategy)
    assert_agrees(report)
    assert report.null_scores == 0


def test_library_refuses_missing_values_for_best_split_extra_tree():
    """ExtraTreeClassifier(splitter='best') refuses NaN in scikit-learn (checked here, as the
    library's own behaviour decides it); a tree with monotonic_cst does not (1.9: it routes)."""
    X, y = datasets.load_wine(return_X_y=True)  # wine: Forina et al., UCI ML repository
    row = X[:1].copy()
    row[0, 3] = np.nan
    refusing = ExtraTreeClassifier(splitter="best", random_state=0).fit(X, y)
    with pytest.raises(ValueError):
        refusing.predict(row)
    assert not ingest(refusing).accepts_missing
    binary = y == 0  # monotonic constraints need a binary target
    routing = DecisionTreeClassifier(monotonic_cst=[1] + [0] * 12, random_state=0).fit(X, binary)
    routing.predict(row)
    assert ingest(routing).accepts_missing


@pytest.mark.parametrize("strategy", STRATEGIES)
def test_model_without_missing_support_gets_null_scores(strategy):
    X, y = datasets.load_wine(return_X_y=True)  # wine: Forina et al., UCI ML repository
    estimator = ExtraTreeClassifier(splitter="best", random_state=0).fit(X, y)
    for combine in Combine:
        report, missing = verify_missing(estimator, strategy, combine)
        assert_agrees(report)
        expected = int(missing.any(axis=1).sum())
        assert report.null_missing == report.null_scores == expected > 100
        assert report.null_refused == 0
