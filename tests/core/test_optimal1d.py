"""Exact one-dimensional k-means.

Outside checks: the optimum of 1-D k-means is a partition of the sorted values into
contiguous runs, found exactly by dynamic programming (Wang & Song (2011),
"Ckmeans.1d.dp: optimal k-means clustering in one dimension", The R Journal 3(2)).
So the solver must equal brute force over every contiguous partition on small
inputs, and can never do worse than scikit-learn's ``KMeans`` (a local heuristic).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from sklearn.cluster import KMeans

from service.core import CoreError, kmeans_1d


def brute_force_cost(x: np.ndarray, k: int) -> float:
    """Least within-group sum of squares over all partitions of sorted x into k runs."""
    s = np.sort(x)
    n = s.size
    best = np.inf
    for cuts in itertools.combinations(range(1, n), k - 1):
        bounds = (0, *cuts, n)
        cost = sum(
            float(((s[a:b] - s[a:b].mean()) ** 2).sum())
            for a, b in itertools.pairwise(bounds)
        )
        best = min(best, cost)
    return best


def check_solution(x: np.ndarray, labels: np.ndarray, centres: np.ndarray, cost: float) -> None:
    """Labels in input order, centres ascending and equal to group means, cost consistent."""
    assert labels.shape == x.shape
    k = centres.size
    assert set(np.unique(labels)) == set(range(k))
    assert np.all(np.diff(centres) > 0)
    for g in range(k):
        np.testing.assert_allclose(centres[g], x[labels == g].mean())
    np.testing.assert_allclose(cost, np.sum((x - centres[labels]) ** 2), rtol=1e-12, atol=1e-12)
    # groups are contiguous runs of the sorted values: group g lies below group g + 1
    for g in range(k - 1):
        assert x[labels == g].max() < x[labels == g + 1].min()


@pytest.mark.parametrize("seed", range(60))
def test_equals_brute_force_on_small_inputs(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 12))
    if seed % 3 == 0:
        x = rng.integers(0, 5, size=n).astype(float)  # many ties
    elif seed % 3 == 1:
        x = rng.normal(size=n)
    else:
        x = np.round(rng.exponential(3.0, size=n), 1)  # skewed, some ties
    distinct = np.unique(x).size
    for k in range(1, n + 1):
        labels, centres, cost = kmeans_1d(x, k)
        check_solution(x, labels, centres, cost)
        assert centres.size == min(k, distinct)
        expected = brute_force_cost(x, k)
        assert cost == pytest.approx(expected, rel=1e-9, abs=1e-9)


def test_equal_values_share_a_group_and_k_above_distinct_values() -> None:
    x = np.array([3.0, 1.0, 3.0, 1.0, 7.0, 3.0])
    labels, centres, cost = kmeans_1d(x, 5)
    np.testing.assert_array_equal(centres, [1.0, 3.0, 7.0])
    np.testing.assert_array_equal(labels, [1, 0, 1, 0, 2, 1])
    assert cost == 0.0
    labels, centres, cost = kmeans_1d(np.full(4, 2.5), 3)
    np.testing.assert_array_equal(labels, 0)
    assert centres.tolist() == [2.5] and cost == 0.0


def test_one_group_is_the_mean() -> None:
    x = np.array([1.0, 2.0, 6.0])
    labels, centres, cost = kmeans_1d(x, 1)
    np.testing.assert_array_equal(labels, 0)
    np.testing.assert_allclose(centres, [3.0])
    assert cost == pytest.approx(14.0)  # (1−3)² + (2−3)² + (6−3)² = 4 + 1 + 9


def test_hand_computed_two_groups() -> None:
    # {0, 1} and {10, 11, 12}: cost 0.5 + 2 = 2.5, any other split is far worse
    x = np.array([11.0, 0.0, 12.0, 1.0, 10.0])
    labels, centres, cost = kmeans_1d(x, 2)
    np.testing.assert_array_equal(labels, [1, 0, 1, 0, 1])
    np.testing.assert_allclose(centres, [0.5, 11.0])
    assert cost == pytest.approx(2.5)


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("k", [2, 3, 5, 8])
def test_never_worse_than_sklearn_kmeans(seed: int, k: int) -> None:
    # reference heuristic: scikit-learn KMeans (k-means++, 10 restarts)
    rng = np.random.default_rng(seed)
    x = np.concatenate(
        [rng.normal(rng.uniform(-20, 20), rng.uniform(0.5, 4), size=rng.integers(20, 400))
         for _ in range(6)]
    )
    labels, centres, cost = kmeans_1d(x, k)
    check_solution(x, labels, centres, cost)
    km = KMeans(n_clusters=k, n_init=10, random_state=seed).fit(x[:, None])
    assert cost <= km.inertia_ * (1 + 1e-9)


@pytest.mark.timeout(300)
def test_hundred_thousand_records() -> None:
    # no timing assertion (benchmarks live in bench/); it must simply finish
    rng = np.random.default_rng(7)
    x = np.concatenate([rng.normal(m, 1.0, size=20_000) for m in (0, 4, 9, 15, 30)])
    labels, centres, cost = kmeans_1d(x, 5)
    check_solution(x, labels, centres, cost)
    km = KMeans(n_clusters=5, n_init=3, random_state=0).fit(x[:, None])
    assert cost <= km.inertia_ * (1 + 1e-9)


def test_far_from_zero_values_keep_precision() -> None:
    x = 1e9 + np.array([0.0, 0.001, 0.002, 5.0, 5.001])
    labels, centres, _ = kmeans_1d(x, 2)
    np.testing.assert_array_equal(labels, [0, 0, 0, 1, 1])


@pytest.mark.parametrize(
    ("x", "k", "field"),
    [
        ([], 1, "records"),
        ([1.0, np.nan], 1, "records"),
        ([1.0, np.inf], 1, "records"),
        ([1.0, 2.0], 0, "k"),
        ([1.0, 2.0], 1.5, "k"),
        ([1.0, 2.0], True, "k"),
    ],
)
def test_invalid_input(x, k, field: str) -> None:
    with pytest.raises(CoreError) as info:
        kmeans_1d(x, k)
    assert info.value.field == field


def quadratic_dp_cost(x: np.ndarray, k: int) -> float:
    """The plain O(k·n²) dynamic programme of Wang & Song (2011), no speed-ups."""
    s = np.sort(x)
    n = s.size
    c1 = np.concatenate(([0.0], np.cumsum(s)))
    c2 = np.concatenate(([0.0], np.cumsum(s * s)))

    def cost(i: int, j: int) -> float:  # values s[i:j]
        return c2[j] - c2[i] - (c1[j] - c1[i]) ** 2 / (j - i)

    D = [0.0] + [cost(0, j) for j in range(1, n + 1)]
    for m in range(2, k + 1):
        best = [min(D[i] + cost(i, j) for i in range(m - 1, j)) for j in range(m, n + 1)]
        D = [np.inf] * m + best
    return float(D[n])


@pytest.mark.parametrize("seed", range(8))
def test_equals_the_plain_dynamic_programme_on_medium_inputs(seed: int) -> None:
    # brute force stops at ~11 values; this checks the divide-and-conquer layers on
    # 60–150 values (ties included) against the recurrence evaluated in full
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(60, 150))
    x = rng.normal(rng.integers(-5, 5, size=n).astype(float), 0.7)
    if seed % 2:
        x = np.round(x, 1)  # many ties
    for k in (2, 3, 5, 9):
        _, _, cost = kmeans_1d(x, k)
        assert cost == pytest.approx(quadratic_dp_cost(x, k), rel=1e-9, abs=1e-9)
