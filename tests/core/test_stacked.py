"""Stacked k-means (cross-validation's held-out grouping) against scikit-learn's
``KMeans`` (the reference implementation: same Lloyd iterations, same greedy
k-means++ seeding), on batches of scikit-learn's bundled UCI optical digits and wine
data (tests/datasets.py)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.cluster import KMeans

from service.core import _stacked
from service.core._stacked import _lloyd, kmeans_stacked
from tests.datasets import load_open, make_batches


def _problems(name: str, seed: int) -> list[tuple[np.ndarray, int]]:
    """Batches of an open data set, standardised and seen through a few random
    diagonal weightings (a stand-in for candidate metrics); each with its true k."""
    X, y = load_open(name)
    rng = np.random.default_rng(seed)
    scale = X.std(axis=0) + 1e-9
    out = []
    for Xb, yb in make_batches(X, y, 4, rng):
        Z = (Xb - Xb.mean(axis=0)) / scale
        k = len(np.unique(yb))
        out += [(Z * rng.uniform(0.2, 2.0, size=Z.shape[1]), k) for _ in range(3)]
    return out


@pytest.mark.parametrize("name", ["digits", "wine"])
def test_lloyd_from_given_centres_equals_scikit_learn(name: str) -> None:
    # reference: sklearn KMeans(init=centres, n_init=1, algorithm="lloyd", tol=0) runs
    # Lloyd from the same centres until no label changes; labels and inertia agree
    for Z, k in _problems(name, seed=1):
        init = Z[np.linspace(0, Z.shape[0] - 1, k).astype(int)]
        Zc, C = Z - Z.mean(axis=0), init - Z.mean(axis=0)
        sq = np.einsum("nr,nr->n", Zc, Zc)[None]
        labels, cost = _lloyd(Zc[None], sq, C[None], k, 300)
        ref = KMeans(k, init=init, n_init=1, algorithm="lloyd", tol=0.0).fit(Z)
        np.testing.assert_array_equal(labels[0, :, 0], ref.labels_)
        assert cost[0, 0] == pytest.approx(ref.inertia_, rel=1e-9)


@pytest.mark.parametrize("name", ["digits", "wine"])
def test_restarts_reach_the_quality_of_scikit_learn_kmeans(name: str) -> None:
    # same number of k-means++ restarts; local optima differ run by run, so the check
    # is on the mean inertia ratio (1 % slack: our tolerance, no source)
    problems = _problems(name, seed=2)
    ratios = []
    for Z, k in problems:
        _, cost = kmeans_stacked(Z[None], k, 4, seed=0)
        ref = KMeans(k, n_init=4, random_state=0).fit(Z)
        ratios.append(cost[0] / ref.inertia_)
    assert np.mean(ratios) <= 1.01
    assert max(ratios) <= 1.10


def test_a_problem_does_not_depend_on_what_is_stacked_with_it(monkeypatch) -> None:
    Z, k = _problems("digits", seed=3)[0]
    others = np.random.default_rng(0).normal(size=(5, *Z.shape))
    alone, cost_alone = kmeans_stacked(Z[None], k, 4, seed=[7, 1])
    together, cost = kmeans_stacked(np.concatenate([others, Z[None]]), k, 4, seed=[7, 1])
    np.testing.assert_array_equal(alone[0], together[-1])
    assert cost[-1] == cost_alone[0]
    # chunking the stack (bounded memory) changes nothing either
    monkeypatch.setattr(_stacked, "CHUNK_ELEMENTS", 1)
    chunked, _ = kmeans_stacked(np.concatenate([others, Z[None]]), k, 4, seed=[7, 1])
    np.testing.assert_array_equal(chunked, together)


def test_location_does_not_matter() -> None:
    # k-means ignores a common offset; a large one must not eat the precision
    Z, k = _problems("wine", seed=4)[0]
    near, _ = kmeans_stacked(Z[None], k, 2, seed=0)
    far, _ = kmeans_stacked(Z[None] + 1e9, k, 2, seed=0)
    np.testing.assert_array_equal(near, far)
