"""Curves over k that the rules for unknown k read: W_k, silhouette, Calinski–Harabasz.

One grouping per k in 1..k_max, all from a single Ward hierarchy: cutting the tree
gives a partition for every k at once, and a few Lloyd (k-means) iterations from
each cut refine it to a k-means local optimum. Ward's merge criterion is the
increase of the within-group sum of squares, the k-means objective, so its cuts are
good k-means starts. This is ~50× cheaper than a k-means++ run with restarts per k,
which matters because a fit calibrates the rule on every training batch.
Silhouettes come from one matrix of pairwise distances (scikit-learn's
``silhouette_score`` is the reference in the tests).
"""

from __future__ import annotations

import numpy as np
from scipy.cluster.hierarchy import linkage
from scipy.spatial.distance import pdist, squareform

from .clustering import single_threaded

SAMPLE_CAP = 1000  # records used to draw the curves (pairwise distances are O(n²))
LLOYD_ITERATIONS = 20


def curves(
    Z: np.ndarray, k_max: int, random_state: int | None = 0, sample_cap: int = SAMPLE_CAP
) -> dict[str, np.ndarray]:
    """``inertia``, ``silhouette``, ``calinski_harabasz`` for k = 1..k_hi, and ``n``.

    Index 0 is k = 1. ``k_hi ≤ k_max`` stops where no more distinct groups form.
    A random subsample of ``sample_cap`` records (seeded) stands for larger inputs.
    """
    n = Z.shape[0]
    if n > sample_cap:
        rng = np.random.default_rng(random_state)
        Z = Z[np.sort(rng.choice(n, sample_cap, replace=False))]
        n = sample_cap
    # centre first: k-means does not care, and the Lloyd step's ‖z‖² − 2zᵀc + ‖c‖²
    # would lose every digit of the spread to a large common offset
    Z = Z - Z.mean(axis=0)
    total = float(np.sum(Z**2))
    out = {"inertia": [total], "silhouette": [np.nan], "calinski_harabasz": [np.nan]}
    k_hi = min(k_max, n)
    if k_hi >= 2 and total > 0 and Z.shape[1] > 0:
        with single_threaded():  # small matrices: BLAS threads cost more than they save
            _fill(out, Z, k_hi, total)
    result = {name: np.asarray(values, dtype=float) for name, values in out.items()}
    result["n"] = np.asarray(float(n))
    return result


def _fill(out: dict[str, list], Z: np.ndarray, k_hi: int, total: float) -> None:
    """Append the k = 2..k_hi points of the three curves (stops early, see ``curves``)."""
    n = Z.shape[0]
    dist = squareform(pdist(Z))
    merges = linkage(Z, method="ward")
    for k in range(2, k_hi + 1):
        labels, within = _lloyd(Z, _cut(merges, n, k), k)
        if labels is None:
            break  # fewer distinct points than k
        out["inertia"].append(within)
        out["silhouette"].append(_silhouette(dist, labels, k) if k < n else np.nan)
        out["calinski_harabasz"].append(
            (total - within) / (k - 1) * (n - k) / within if within > 0 and k < n else np.inf
        )


def _cut(merges: np.ndarray, n: int, k: int) -> np.ndarray:
    """Leaf labels 0..k−1 of the Ward tree cut into exactly k groups."""
    children = merges[:, :2].astype(np.intp)
    top = children[n - k :]  # the last k − 1 merges are undone
    undone = set(range(2 * n - k, 2 * n - 1))
    roots = [int(c) for c in top.ravel() if int(c) not in undone]
    label = np.full(2 * n - 1, -1, dtype=np.intp)
    label[roots] = np.arange(len(roots))
    for node in range(2 * n - k - 1, n - 1, -1):  # top-down below the cut
        if label[node] >= 0:
            label[children[node - n]] = label[node]
    return label[:n]


def _lloyd(Z: np.ndarray, labels: np.ndarray, k: int) -> tuple[np.ndarray | None, float]:
    """Lloyd iterations from a partition; ``(None, 0)`` when a group empties at once."""
    sq = np.einsum("ij,ij->i", Z, Z)
    best, best_centres = None, None
    for _ in range(LLOYD_ITERATIONS):
        counts = np.bincount(labels, minlength=k)
        if np.any(counts == 0):
            break  # keep the last partition with k groups
        best, best_centres = labels, _means(Z, labels, counts)
        d2 = sq[:, None] - 2.0 * Z @ best_centres.T + np.einsum("ij,ij->i", *[best_centres] * 2)
        labels = np.argmin(d2, axis=1)
        if np.array_equal(labels, best):
            break
    if best is None:
        return None, 0.0
    return best, float(np.sum((Z - best_centres[best]) ** 2))


def _means(Z: np.ndarray, labels: np.ndarray, counts: np.ndarray) -> np.ndarray:
    k = counts.shape[0]
    sums = np.stack([np.bincount(labels, weights=col, minlength=k) for col in Z.T], axis=1)
    return sums / counts[:, None]


def _silhouette(dist: np.ndarray, labels: np.ndarray, k: int) -> float:
    """Mean silhouette, defined as scikit-learn's ``silhouette_score`` computes it."""
    onehot = np.zeros((labels.size, k))
    onehot[np.arange(labels.size), labels] = 1.0
    sums = dist @ onehot  # distance of each record to all records of each group
    counts = onehot.sum(axis=0)
    rows = np.arange(labels.size)
    own_n = counts[labels] - 1.0
    a = np.divide(sums[rows, labels], own_n, out=np.zeros(labels.size), where=own_n > 0)
    mean_to = sums / counts
    mean_to[rows, labels] = np.inf
    b = mean_to.min(axis=1)
    denom = np.maximum(a, b)
    s = np.divide(b - a, denom, out=np.zeros(labels.size), where=denom > 0)
    s[own_n == 0] = 0.0  # a record alone in its group scores 0
    return float(s.mean())
