"""Grouping records with a fitted metric.

Outside checks:
* with M = I the grouping is exactly scikit-learn ``KMeans`` on the standardised
  records from the same initial centres (scikit-learn as reference);
* a rank-1 map groups with the exact 1-D solver (Wang & Song (2011), "Ckmeans.1d.dp",
  The R Journal 3(2)), so it is never worse than ``KMeans`` on the projected values.
Data: scikit-learn's bundled wine data (UCI, Forina et al.).
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.cluster import KMeans
from sklearn.metrics import adjusted_rand_score

from service.core import BatchStats, CoreError, FittedMetric, group_records, kmeans_1d
from tests.datasets import load_open, make_batches, split_pool


def canonical(labels: np.ndarray) -> np.ndarray:
    """Renumber groups by first appearance, so two partitions compare with ==."""
    _, first, inverse = np.unique(labels, return_index=True, return_inverse=True)
    return np.argsort(np.argsort(first))[inverse.reshape(-1)]


def euclidean_metric(batches) -> FittedMetric:
    """M = I on features standardised by the pooled within-batch standard deviation."""
    stats = BatchStats.sum(BatchStats.from_batch(X, y) for X, y in batches)
    scales = np.sqrt(np.diag(stats.G) / stats.n)
    d = scales.size
    return FittedMetric("euclidean", 0.0, scales, stats.mean, np.eye(d))


@pytest.fixture(scope="module")
def wine():
    X, y = load_open("wine")
    rng = np.random.default_rng(3)
    (Xf, yf), (Xs, ys) = split_pool(X, y, rng)
    return make_batches(Xf, yf, 6, rng), (Xs, ys)


def test_identity_metric_equals_sklearn_kmeans_from_same_centres(wine) -> None:
    # reference: scikit-learn KMeans on the standardised records (docs/method.md, M = I)
    batches, (X, y) = wine
    metric = euclidean_metric(batches)
    standardised = (X - metric.mean) / metric.scales
    rng = np.random.default_rng(0)
    for k in (2, 3, 5):
        init = standardised[rng.choice(len(X), k, replace=False)]
        ours = group_records(metric, X, k=k, init=init)
        ref = KMeans(n_clusters=k, init=init, n_init=1).fit(standardised)
        np.testing.assert_array_equal(ours.labels, canonical(ref.labels_))
        assert ours.k == k


def test_identity_metric_equals_sklearn_kmeans_plus_plus_with_same_seed(wine) -> None:
    batches, (X, _) = wine
    metric = euclidean_metric(batches)
    standardised = (X - metric.mean) / metric.scales
    ours = group_records(metric, X, k=3, random_state=11, n_init=4)
    ref = KMeans(n_clusters=3, n_init=4, random_state=11).fit(standardised)
    np.testing.assert_array_equal(ours.labels, canonical(ref.labels_))


def test_rank_one_map_uses_the_exact_solver(wine) -> None:
    # Wang & Song (2011): 1-D k-means has an exact optimum; KMeans is the heuristic
    batches, (X, _) = wine
    base = euclidean_metric(batches)
    w = np.random.default_rng(1).normal(size=(1, base.n_features))
    metric = FittedMetric("closed_form", 1e-3, base.scales, base.mean, w)
    z = metric.transform(X)[:, 0]
    for k in (2, 3, 4):
        grouping = group_records(metric, X, k=k)
        labels, _, cost = kmeans_1d(z, k)
        assert adjusted_rand_score(labels, grouping.labels) == 1.0
        ours = sum(((z[grouping.labels == g] - z[grouping.labels == g].mean()) ** 2).sum()
                   for g in range(grouping.k))
        assert ours == pytest.approx(cost)
        km = KMeans(n_clusters=k, n_init=10, random_state=0).fit(z[:, None])
        assert cost <= km.inertia_ * (1 + 1e-9)


def test_same_input_same_output(wine) -> None:
    batches, (X, _) = wine
    metric = euclidean_metric(batches)
    for k in (3, None):
        a = group_records(metric, X, k=k, random_state=5)
        b = group_records(metric, X.copy(), k=k, random_state=5)
        assert a.k == b.k and a.k_chosen == b.k_chosen == (k is None)
        for name in ("labels", "distances", "margins", "sizes"):
            np.testing.assert_array_equal(getattr(a, name), getattr(b, name))


def test_distances_and_margins_by_hand() -> None:
    # scales 2 and mean (1, 1): standardised records (0,0), (0,1), (5,0), (5,1)
    metric = FittedMetric("euclidean", 0.0, np.array([2.0, 2.0]), np.ones(2), np.eye(2))
    X = np.array([[1.0, 1.0], [11.0, 1.0], [1.0, 3.0], [11.0, 3.0]])
    g = group_records(metric, X, k=2)
    np.testing.assert_array_equal(g.labels, [0, 1, 0, 1])  # numbered by first appearance
    np.testing.assert_array_equal(g.sizes, [2, 2])
    # centres (0, 0.5) and (5, 0.5): own distance 0.5, other sqrt(25 + 0.25)
    np.testing.assert_allclose(g.distances, 0.5)
    np.testing.assert_allclose(g.margins, np.sqrt(25.25) - 0.5)
    assert g.k == 2 and not g.k_chosen


def test_learned_map_changes_the_grouping() -> None:
    # two features; the map keeps only the second: groups split along it
    X = np.array([[0.0, 0.0], [9.0, 0.1], [0.1, 5.0], [9.1, 5.0]])
    metric = FittedMetric("closed_form", 0.0, np.ones(2), np.zeros(2), np.array([[0.0, 2.0]]))
    g = group_records(metric, X, k=2)
    np.testing.assert_array_equal(g.labels, [0, 0, 1, 1])
    # z = 2·x₂ = (0, 0.2, 10, 10): centres 0.1 and 10
    np.testing.assert_allclose(g.distances, [0.1, 0.1, 0.0, 0.0], atol=1e-12)
    np.testing.assert_allclose(g.margins, [9.9, 9.7, 9.9, 9.9])


def test_rank_zero_and_duplicates_give_fewer_groups() -> None:
    X = np.array([[1.0, 2.0], [3.0, 4.0], [5.0, 7.0]])
    flat = FittedMetric("closed_form", 0.0, np.ones(2), np.zeros(2), np.zeros((0, 2)))
    g = group_records(flat, X, k=2)
    assert g.k == 1 and g.sizes.tolist() == [3]
    np.testing.assert_array_equal(g.distances, 0.0)
    assert np.isinf(g.margins).all()  # no second group to be near
    same = np.array([[1.0, 1.0]] * 3 + [[2.0, 2.0]] * 2)
    ident = FittedMetric("euclidean", 0.0, np.ones(2), np.zeros(2), np.eye(2))
    g = group_records(ident, same, k=4)
    assert g.k == 2 and g.labels.tolist() == [0, 0, 0, 1, 1]


@pytest.mark.parametrize(
    ("X", "kwargs", "field"),
    [
        (np.zeros((3, 2)) + np.arange(3)[:, None], {"k": 4}, "k"),
        (np.zeros((3, 2)), {"k": 0}, "k"),
        (np.zeros((3, 2)), {"k": 2.0}, "k"),
        (np.zeros((3, 3)), {"k": 2}, "records"),
        (np.array([[0.0, 1.0], [np.nan, 2.0]]), {"k": 2}, "records"),
        ([[0.0, 1.0], [2.0]], {"k": 1}, "records"),
        (np.zeros((0, 2)), {"k": 1}, "records"),
        (np.eye(2), {"k": 2, "init": np.zeros((3, 2))}, "init"),
        (np.eye(2), {"k": 2, "n_init": 0}, "n_init"),
    ],
)
def test_invalid_input(X, kwargs, field: str) -> None:
    metric = FittedMetric("euclidean", 0.0, np.ones(2), np.zeros(2), np.eye(2))
    with pytest.raises(CoreError) as info:
        group_records(metric, X, **kwargs)
    assert info.value.field == field
    assert info.value.message


def test_values_that_overflow_in_the_learned_space_are_a_core_error():
    """Finite input whose mapped values overflow float64 is the caller's error, named
    as such, not a scikit-learn ValueError (own check; float64 limits per IEEE 754)."""
    from sklearn.datasets import load_iris

    from service.core import BatchStats, fit_metric

    X, y = load_iris(return_X_y=True)
    metric = fit_metric(BatchStats.from_batch(X, y), "closed_form", 1e-3)
    huge = np.full((5, 4), 1e308)
    for k in (1, 2):
        with pytest.raises(CoreError) as err:
            group_records(metric, huge, k)
        assert err.value.field == "records" and "row 0" in err.value.message
