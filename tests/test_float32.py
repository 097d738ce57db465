"""float32 threshold emulation: SQL compares doubles, scikit-learn compares float32(x).

The reference is IEEE 754-2019 binary32 rounding (round to nearest, ties to even) as
numpy's float64 -> float32 cast implements it, and scikit-learn's own predictions.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from helpers import STRATEGIES, assert_agrees, check
from sklearn import datasets
from sklearn.ensemble import RandomForestClassifier, RandomForestRegressor
from sklearn.tree import DecisionTreeClassifier

from tree2sql.exact import FLOAT32_MAX, FLOAT32_OVERFLOW, bounds
from tree2sql.forest import LEAF, Comparison

# scikit-learn sums X to look for NaN and inf; on rows near FLT_MAX that sum overflows.
pytestmark = pytest.mark.filterwarnings(
    "ignore:overflow encountered in reduce:RuntimeWarning",
    "ignore:invalid value encountered in reduce:RuntimeWarning")

F32 = np.float32
TINY32 = float(np.nextafter(F32(0), F32(1)))  # 2**-149, the smallest float32 subnormal


def f32(x) -> np.ndarray:
    """IEEE round-to-nearest-even cast to float32 (inf past the float32 range)."""
    with np.errstate(over="ignore"):
        return np.asarray(x, dtype=np.float64).astype(np.float32)


def neighbours(values: np.ndarray) -> np.ndarray:
    """Each double with the next double down and up."""
    v = np.asarray(values, dtype=np.float64)
    return np.concatenate([v, np.nextafter(v, -np.inf), np.nextafter(v, np.inf)])


@np.errstate(over="ignore", invalid="ignore")  # stepping past FLT_MAX gives inf, on purpose
def float32_landmarks(t: np.ndarray) -> np.ndarray:
    """For thresholds t: the float32s around t and the rounding midpoints between them."""
    t = np.asarray(t, dtype=np.float64)
    low = f32(t)
    low = np.where(low.astype(np.float64) > t, np.nextafter(low, F32(-np.inf)), low)
    high = np.nextafter(low, F32(np.inf))
    lo64, hi64 = low.astype(np.float64), high.astype(np.float64)
    mid = np.where(np.isinf(hi64), FLOAT32_OVERFLOW, (lo64 + hi64) / 2)
    return neighbours(np.concatenate([t, mid, lo64, hi64]))


def adversarial_thresholds(rng: np.random.Generator) -> np.ndarray:
    bits = rng.integers(0, 2**64, 3000, dtype=np.uint64).view(np.float64)
    bits32 = rng.integers(0, 2**32, 3000, dtype=np.uint64).astype(np.uint32).view(np.float32)
    ordinary = rng.normal(0, 100, 1000)
    singles = bits32[np.isfinite(bits32)].astype(np.float64)
    mids = (singles + np.nextafter(singles.astype(np.float32), F32(np.inf))
            .astype(np.float64)) / 2
    special = [0.0, -0.0, 5e-324, -5e-324, TINY32, -TINY32, TINY32 / 2, 1.5 * TINY32,
               2.0**-126, 2.0**-126 - 2.0**-150, FLOAT32_MAX, -FLOAT32_MAX,
               float(np.nextafter(F32(FLOAT32_MAX), F32(0))), FLOAT32_OVERFLOW,
               -FLOAT32_OVERFLOW, 1e300, -1e300, 0.1, 0.2, 0.3, 1 / 3, 2.5, 1.0, -1.0]
    t = np.concatenate([bits[np.isfinite(bits)], singles, mids, ordinary, special])
    return np.concatenate([t, np.nextafter(t, -np.inf), np.nextafter(t, np.inf)])


def pairs(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """(threshold, x) pairs: each threshold with its landmarks and random doubles.

    x stays below float32 overflow: beyond it the library refuses the row (see
    test_library_refuses_beyond_float32_range), so no bound is asked to match it there.
    """
    t = adversarial_thresholds(rng)
    marks = float32_landmarks(t).reshape(-1, len(t)).T  # (thresholds, landmarks)
    noise = t[:, None] * (1 + rng.normal(0, 1e-7, (len(t), 4)))
    xs = np.concatenate([marks, noise, rng.normal(0, 1e3, (len(t), 2)),
                         np.tile([0.0, -0.0, 5e-324, -5e-324, TINY32 / 2], (len(t), 1))],
                        axis=1)
    tt = np.repeat(t, xs.shape[1])
    xs = xs.ravel()
    keep = np.isfinite(xs) & (np.abs(xs) < FLOAT32_OVERFLOW)
    return tt[keep], xs[keep]


def test_bounds_match_float32_le_by_brute_force():
    t, x = pairs(np.random.default_rng(20240501))
    assert len(x) > 100_000
    b = bounds(t, Comparison.FLOAT32_LE)
    with np.errstate(invalid="ignore"):
        want = f32(x) <= t  # numpy compares float32 with float64 exactly (promotion)
    got = x <= b
    wrong = np.flatnonzero(got != want)
    assert wrong.size == 0, [(t[i], x[i], b[i]) for i in wrong[:5]]
    # The test is sharp: comparing the double itself would be wrong on many pairs.
    assert np.count_nonzero((x <= t) != want) > 1000


def test_bounds_match_float32_lt_by_brute_force():
    t, x = pairs(np.random.default_rng(7))
    b = bounds(t, Comparison.FLOAT32_LT)
    want = f32(x) < t
    assert np.array_equal(x <= b, want)
    representable = f32(t).astype(np.float64) == t
    assert representable.sum() > 1000
    assert np.array_equal((x <= b)[representable],
                          (f32(x) < f32(t))[representable])


def test_bounds_float64_le_is_the_threshold():
    t, x = pairs(np.random.default_rng(3))
    b = bounds(t, Comparison.FLOAT64_LE)
    assert np.array_equal(x <= b, x <= t)


def test_library_refuses_beyond_float32_range():
    """scikit-learn refuses x >= FLOAT32_OVERFLOW (it rounds to inf) and takes the double below."""
    X, y = datasets.load_iris(return_X_y=True)  # iris: Fisher 1936, UCI ML repository
    model = DecisionTreeClassifier(random_state=0).fit(X, y)
    below = float(np.nextafter(FLOAT32_OVERFLOW, 0))
    assert np.isinf(f32(FLOAT32_OVERFLOW)) and f32(below) == F32(FLOAT32_MAX)
    for sign in (1, -1):
        row = X[:1].copy()
        row[0, 2] = sign * below
        model.predict(row)  # accepted: rounds to +-FLT_MAX
        for refused in (FLOAT32_OVERFLOW, np.inf, 1e300):
            row[0, 2] = sign * refused
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)  # numpy's overflow notice
                with pytest.raises(ValueError):
                    model.predict(row)


def adversarial_training_set(rng: np.random.Generator, n: int = 400):
    """Features whose float32 values sit side by side, so thresholds land on float32
    rounding midpoints: adjacent float32s near 1, subnormals, values near FLT_MAX, decimals."""
    one = np.nextafter(F32(1), F32(2))
    adjacent = np.array([F32(1), one, np.nextafter(one, F32(2)), F32(-3),
                         np.nextafter(F32(-3), F32(0))], dtype=np.float64)
    tiny = np.array([-2, -1, 0, 1, 2, 3, 2**23 - 1, 2**23]) * TINY32
    huge = np.array([FLOAT32_MAX, np.nextafter(F32(FLOAT32_MAX), F32(0)), -FLOAT32_MAX,
                     1e38, -3e38], dtype=np.float64)
    decimal = f32([0.1, 0.2, 0.3, 0.7, 1e-3]).astype(np.float64)
    spread = rng.normal(0, 50, n)
    X = np.column_stack([rng.choice(v, n) for v in (adjacent, tiny, huge, decimal)] + [spread])
    return X, rng.integers(0, 3, n)


def boundary_rows(estimator, X_fit: np.ndarray) -> np.ndarray:
    """Per split of every tree: a fitted row reaching the split, with the split's feature
    replaced by each float32 landmark of the threshold (midpoints and their neighbours)."""
    rows = []
    for member in getattr(estimator, "estimators_", None) or [estimator]:
        tree = member.tree_
        reach = member.decision_path(X_fit.astype(np.float32)).tocsc()
        for node in np.flatnonzero(tree.children_left != LEAF):
            first = reach[:, node].nonzero()[0][0]
            values = float32_landmarks(np.array([tree.threshold[node]]))
            block = np.repeat(X_fit[first:first + 1], len(values), axis=0)
            block[:, tree.feature[node]] = values
            rows.append(block)
    return np.concatenate(rows)


def special_rows(X_fit: np.ndarray) -> np.ndarray:
    """Each feature in turn set to values at the edges of float32 and double."""
    below = float(np.nextafter(FLOAT32_OVERFLOW, 0))
    specials = [0.0, -0.0, 5e-324, -5e-324, TINY32, TINY32 / 2, -TINY32 / 2, 1.5 * TINY32,
                2.0**-126, FLOAT32_MAX, -FLOAT32_MAX, below, -below, FLOAT32_OVERFLOW,
                -FLOAT32_OVERFLOW, 1e300, -1e308, np.inf, -np.inf]
    rows = []
    for feature in range(X_fit.shape[1]):
        block = np.repeat(X_fit[:1], len(specials), axis=0)
        block[:, feature] = specials
        rows.append(block)
    return np.concatenate(rows)


def _models():
    rng = np.random.default_rng(11)
    X_adv, y_adv = adversarial_training_set(rng)
    # iris: Fisher 1936, UCI ML repository
    X_iris, y_iris = datasets.load_iris(return_X_y=True)
    return {
        "adversarial_tree": (DecisionTreeClassifier(random_state=0), X_adv, y_adv),
        "adversarial_forest": (RandomForestClassifier(n_estimators=4, random_state=0),
                               X_adv, y_adv),
        "adversarial_regressor": (RandomForestRegressor(n_estimators=3, random_state=0),
                                  X_adv, y_adv * 1.5 + rng.normal(0, 1, len(y_adv))),
        "iris_forest": (RandomForestClassifier(n_estimators=5, random_state=0),
                        X_iris, y_iris),
    }


MODELS = _models()


@pytest.mark.parametrize("strategy", STRATEGIES)
@pytest.mark.parametrize("name", sorted(MODELS))
def test_rows_at_float32_boundaries_agree(name, strategy):
    estimator, X_fit, y = MODELS[name]
    estimator.fit(X_fit, y)
    edges = boundary_rows(estimator, X_fit)
    X = np.concatenate([edges, special_rows(X_fit)])
    report = check(estimator, X, strategy=strategy)
    assert_agrees(report)
    with np.errstate(invalid="ignore"):
        refused = np.isinf(f32(X)).any(axis=1)  # IEEE: rounds past float32's range
    assert report.null_refused == refused.sum() > 0
    assert report.null_scores == refused.sum()


def test_boundary_rows_are_sharp():
    """The adversarial model's thresholds sit exactly on float32 rounding midpoints, and
    its boundary rows include values a plain double comparison would send the wrong way."""
    estimator, X_fit, y = MODELS["adversarial_tree"]
    estimator.fit(X_fit, y)
    tree = estimator.tree_
    t = tree.threshold[tree.children_left != LEAF]
    low = f32(t).astype(np.float64)
    on_midpoint = (low != t) & np.isin(t, float32_landmarks(t))
    assert on_midpoint.sum() >= 5
    marks = float32_landmarks(t).reshape(-1, len(t))
    with np.errstate(invalid="ignore"):
        naive_wrong = (marks <= t) != (f32(marks) <= t)
    assert naive_wrong.sum() >= 10
