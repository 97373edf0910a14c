"""The stacked k curves against the per-k implementation they replaced, and outside references.

References:

* ``_reference_curves`` below: the implementation of ``service.core.kcurves.curves``
  before the stacked rewrite (one Ward cut, Lloyd run and silhouette per k), kept
  verbatim apart from names; the new code must give the same curves;
* scikit-learn ``KMeans(init=<centres of the Ward cut>, n_init=1, algorithm="lloyd")``
  for the Lloyd refinement, ``silhouette_score`` and ``calinski_harabasz_score`` for
  the curves, scipy ``cut_tree`` for cutting the Ward tree.

Inputs are random (seeded): Gaussian noise, blobs, integer-valued records (exact
ties), few distinct points (groups that empty during Lloyd), k_max ≥ n.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.cluster.hierarchy import cut_tree, linkage
from scipy.spatial.distance import pdist, squareform
from sklearn.cluster import KMeans
from sklearn.datasets import make_blobs
from sklearn.metrics import adjusted_rand_score, calinski_harabasz_score, silhouette_score

from service.core import kcurves
from service.core.kcurves import LLOYD_ITERATIONS, _cut, _cuts, _lloyd, _Stack, curves

# ---------------------------------------------------------------------------------
# reference: the per-k implementation before the stacked rewrite


def _reference_curves(Z: np.ndarray, k_max: int, random_state=0, sample_cap=1000) -> dict:
    n = Z.shape[0]
    if n > sample_cap:
        rng = np.random.default_rng(random_state)
        Z = Z[np.sort(rng.choice(n, sample_cap, replace=False))]
        n = sample_cap
    Z = Z - Z.mean(axis=0)
    total = float(np.sum(Z**2))
    out = {"inertia": [total], "silhouette": [np.nan], "calinski_harabasz": [np.nan]}
    k_hi = min(k_max, n)
    if k_hi >= 2 and total > 0 and Z.shape[1] > 0:
        dist = squareform(pdist(Z))
        merges = linkage(Z, method="ward")
        for k in range(2, k_hi + 1):
            labels, within = _reference_lloyd(Z, _reference_cut(merges, n, k), k)
            if labels is None:
                break
            out["inertia"].append(within)
            out["silhouette"].append(_reference_silhouette(dist, labels, k) if k < n else np.nan)
            out["calinski_harabasz"].append(
                (total - within) / (k - 1) * (n - k) / within if within > 0 and k < n else np.inf
            )
    result = {name: np.asarray(values, dtype=float) for name, values in out.items()}
    result["n"] = np.asarray(float(n))
    return result


def _reference_cut(merges: np.ndarray, n: int, k: int) -> np.ndarray:
    children = merges[:, :2].astype(np.intp)
    top = children[n - k :]
    undone = set(range(2 * n - k, 2 * n - 1))
    roots = [int(c) for c in top.ravel() if int(c) not in undone]
    label = np.full(2 * n - 1, -1, dtype=np.intp)
    label[roots] = np.arange(len(roots))
    for node in range(2 * n - k - 1, n - 1, -1):
        if label[node] >= 0:
            label[children[node - n]] = label[node]
    return label[:n]


def _reference_lloyd(Z: np.ndarray, labels: np.ndarray, k: int, trace: list | None = None):
    sq = np.einsum("ij,ij->i", Z, Z)
    best, best_centres = None, None
    for _ in range(LLOYD_ITERATIONS):
        counts = np.bincount(labels, minlength=k)
        if np.any(counts == 0):
            if trace is not None:
                trace.append(k)  # a group emptied during the iterations
            break
        best = labels
        best_centres = np.stack(
            [np.bincount(labels, weights=col, minlength=k) for col in Z.T], axis=1
        ) / counts[:, None]
        d2 = sq[:, None] - 2.0 * Z @ best_centres.T + np.einsum("ij,ij->i", *[best_centres] * 2)
        labels = np.argmin(d2, axis=1)
        if np.array_equal(labels, best):
            break
    if best is None:
        return None, 0.0
    return best, float(np.sum((Z - best_centres[best]) ** 2))


def _reference_silhouette(dist: np.ndarray, labels: np.ndarray, k: int) -> float:
    onehot = np.zeros((labels.size, k))
    onehot[np.arange(labels.size), labels] = 1.0
    sums = dist @ onehot
    counts = onehot.sum(axis=0)
    rows = np.arange(labels.size)
    own_n = counts[labels] - 1.0
    a = np.divide(sums[rows, labels], own_n, out=np.zeros(labels.size), where=own_n > 0)
    mean_to = sums / counts
    mean_to[rows, labels] = np.inf
    b = mean_to.min(axis=1)
    denom = np.maximum(a, b)
    s = np.divide(b - a, denom, out=np.zeros(labels.size), where=denom > 0)
    s[own_n == 0] = 0.0
    return float(s.mean())


# ---------------------------------------------------------------------------------


def _records(family: str, seed: int) -> tuple[np.ndarray, int]:
    rng = np.random.default_rng(seed)
    n, r = int(rng.integers(2, 220)), int(rng.integers(1, 70))
    k_max = int(rng.integers(2, 16))
    if family == "normal":
        return rng.normal(size=(n, r)), k_max
    if family == "blobs":
        centers = int(rng.integers(1, 8))
        return make_blobs(n, r, centers=centers, random_state=seed)[0], k_max
    if family == "integers":  # exact ties between distances
        return np.round(rng.normal(size=(n, r))), k_max
    if family == "few_distinct":  # duplicates: groups empty during the iterations
        distinct = int(rng.integers(1, 13))
        return rng.normal(size=(distinct, r))[rng.integers(0, distinct, n)], k_max
    raise AssertionError(family)


def assert_same_curves(new: dict, ref: dict) -> None:
    assert new.keys() == ref.keys()
    assert float(new["n"]) == float(ref["n"])
    for name in ("inertia", "silhouette", "calinski_harabasz"):
        assert new[name].shape == ref[name].shape, name
    total = ref["inertia"][0]
    np.testing.assert_allclose(new["inertia"], ref["inertia"], rtol=1e-9, atol=1e-12 * total)
    np.testing.assert_allclose(new["silhouette"], ref["silhouette"], rtol=1e-9, atol=1e-12)
    # the ratio divides by W_k: where W_k is rounding noise (fewer distinct points
    # than k) the reference's ratio is noise over noise (only its size means
    # anything); the new code calls it infinite below 1e-12 of W_1
    meaningful = ref["inertia"] > 1e-9 * total
    np.testing.assert_allclose(
        new["calinski_harabasz"][meaningful], ref["calinski_harabasz"][meaningful], rtol=1e-9
    )
    assert np.all(new["calinski_harabasz"][~meaningful][1:] > 1e9)
    assert np.all(ref["calinski_harabasz"][~meaningful][1:] > 1e9)


@pytest.mark.parametrize("family", ["normal", "blobs", "integers", "few_distinct"])
def test_curves_match_the_per_k_reference(family: str) -> None:
    for seed in range(40):
        Z, k_max = _records(family, seed)
        assert_same_curves(curves(Z, k_max), _reference_curves(Z, k_max))


@pytest.mark.parametrize("shape", [(2, 3), (3, 1), (5, 4), (12, 2), (30, 64)])
def test_k_up_to_n_matches_the_reference(shape: tuple[int, int]) -> None:
    # k = n: every record alone (silhouette undefined, ratio infinite)
    Z = np.random.default_rng(sum(shape)).normal(size=shape)
    new, ref = curves(Z, 40), _reference_curves(Z, 40)
    assert_same_curves(new, ref)
    assert new["inertia"].size == shape[0]
    assert np.isnan(new["silhouette"][-1]) and np.isinf(new["calinski_harabasz"][-1])


def test_emptied_groups_keep_the_last_partition() -> None:
    # three distinct points, each repeated: a cut at k > 3 splits copies of a point,
    # the next assignment sends all copies to one centre and a group empties
    rng = np.random.default_rng(7)
    Z = np.repeat(rng.normal(size=(3, 4)) * 5.0, [4, 5, 6], axis=0)
    Z = Z - Z.mean(axis=0)
    n = Z.shape[0]
    merges = linkage(Z, method="ward")
    ks = np.arange(2, 9)
    starts = _cuts(merges, n, 8)
    labels, within = _lloyd(Z, starts, _Stack(ks, n))
    emptied: list[int] = []
    for k in ks:
        ref_labels, ref_within = _reference_lloyd(Z, _reference_cut(merges, n, k), k, emptied)
        np.testing.assert_array_equal(labels[k - 2], ref_labels)
        assert within[k - 2] == pytest.approx(ref_within, abs=1e-12)
        assert np.unique(labels[k - 2]).size == k  # still k groups
    assert set(emptied) == set(range(4, 9))  # the path under test was taken
    assert_same_curves(curves(Z, 8), _reference_curves(Z, 8))


def test_batches_of_k_values_match_the_reference(monkeypatch) -> None:
    # a small bound on the temporaries splits k = 2..k_max into several stacks
    monkeypatch.setattr(kcurves, "_BLOCK_ELEMENTS", 3000)
    monkeypatch.setattr(kcurves, "_CACHE_ELEMENTS", 64)
    assert len(list(kcurves._batches(60, 5, 25))) > 3
    for family in ("normal", "few_distinct"):
        for seed in range(6):
            Z, _ = _records(family, seed)
            assert_same_curves(curves(Z, 25), _reference_curves(Z, 25))


def test_subsample_matches_the_reference() -> None:
    Z = np.random.default_rng(3).normal(size=(1500, 3))
    assert_same_curves(curves(Z, 6, random_state=5), _reference_curves(Z, 6, random_state=5))


def test_cuts_match_scipy_cut_tree_and_the_reference_numbering() -> None:
    # reference: scipy's cut_tree (same partition), the per-k cut (same numbering)
    rng = np.random.default_rng(11)
    for n in (2, 3, 9, 40, 150):
        Z = rng.normal(size=(n, 3))
        Z[: n // 3] = Z[0]  # ties in the merge heights
        merges = linkage(Z, method="ward")
        k_hi = min(n, 12)
        table = _cuts(merges, n, k_hi)
        assert table.shape == (k_hi - 1, n)
        for k in range(2, k_hi + 1):
            np.testing.assert_array_equal(table[k - 2], _reference_cut(merges, n, k))
            np.testing.assert_array_equal(_cut(merges, n, k), table[k - 2])
            truth = cut_tree(merges, n_clusters=k)[:, 0]
            assert adjusted_rand_score(table[k - 2], truth) == 1.0


def test_curves_match_sklearn_kmeans_and_scores() -> None:
    # outside references: scikit-learn KMeans from the Ward cut's centres (Lloyd,
    # one start, at most LLOYD_ITERATIONS iterations), silhouette_score and
    # calinski_harabasz_score on its labels
    for seed in range(5):
        Z, _ = make_blobs(120, 6, centers=4, cluster_std=2.0, random_state=seed)
        Zc = Z - Z.mean(axis=0)
        c = curves(Z, 8)
        merges = linkage(Zc, method="ward")
        for k in range(2, 9):
            start = _cut(merges, Zc.shape[0], k)
            init = np.stack([Zc[start == g].mean(axis=0) for g in range(k)])
            km = KMeans(
                k, init=init, n_init=1, algorithm="lloyd", max_iter=LLOYD_ITERATIONS, tol=0.0
            ).fit(Zc)
            assert c["inertia"][k - 1] == pytest.approx(km.inertia_, rel=1e-9)
            assert c["silhouette"][k - 1] == pytest.approx(
                silhouette_score(Zc, km.labels_), rel=1e-9
            )
            assert c["calinski_harabasz"][k - 1] == pytest.approx(
                calinski_harabasz_score(Zc, km.labels_), rel=1e-7
            )


def test_stacked_silhouettes_match_sklearn() -> None:
    # reference: scikit-learn silhouette_score, one partition per k in one stack
    rng = np.random.default_rng(2)
    Z = rng.normal(size=(50, 3))
    dist = squareform(pdist(Z))
    ks = np.arange(2, 9)
    labels = np.stack([rng.permutation(np.arange(50) % k) for k in ks])
    labels[3, :3] = [0, 1, 2]  # singletons: group 5 of k = 5 has one record
    labels[3, 3:][labels[3, 3:] == 4] = 3
    labels[3, 10] = 4
    values = kcurves._silhouettes(dist, labels, _Stack(ks, 50))
    for k, row, value in zip(ks, labels, values, strict=True):
        assert value == pytest.approx(silhouette_score(Z, row), abs=1e-12), k


def test_curves_stop_before_a_start_with_an_empty_group() -> None:
    # a cut of the tree never has one; the guard keeps the old contract (rows: k = 2, 3, 4)
    starts = np.array([[0, 1, 1, 0], [0, 1, 2, 2], [0, 1, 1, 2]])
    assert kcurves._distinct(starts, 4) == 3
    assert kcurves._distinct(starts[:2], 3) == 3
    assert kcurves._distinct(np.array([[0, 0, 0, 0]]), 2) == 1


@pytest.mark.parametrize("ks", [[2], [2, 3, 4, 5, 6, 7, 8, 9, 10], [5, 9, 10], [3, 3, 17]])
def test_stacked_argmin_matches_numpy_argmin(ks: list[int]) -> None:
    # reference: numpy's argmin over each k's segment (the first least value wins,
    # a NaN counts as the least), with exact ties, ±0, infinities and NaN
    rng = np.random.default_rng(len(ks))
    stack = _Stack(np.array(ks), 300)
    for case in ("plain", "ties", "signed_zero", "inf", "nan"):
        values = np.round(rng.normal(size=(300, stack.size)), 1 if case == "ties" else 6)
        if case == "signed_zero":
            values[:, ::2] = 0.0
            values[:, 1::2] = -0.0
        if case == "inf":
            values[rng.random(values.shape) < 0.3] = np.inf
            values[:50] = np.inf  # every value of a record infinite
        if case == "nan":
            values[rng.random(values.shape) < 0.05] = np.nan
        got = stack.argmin(values)
        for j, (offset, k) in enumerate(zip(stack.offsets, ks, strict=True)):
            want = np.argmin(values[:, offset : offset + k], axis=1)
            np.testing.assert_array_equal(got[j], want, err_msg=f"{case}, k={k}")
