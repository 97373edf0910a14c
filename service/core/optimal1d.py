"""Exact one-dimensional k-means: sorting + dynamic programming in O(k·n log n).

In one dimension an optimal k-means partition is a set of contiguous runs of the
sorted data, so the optimum is a shortest-path-like dynamic programme over the
sorted values (Wang & Song (2011), "Ckmeans.1d.dp: optimal k-means clustering in
one dimension", The R Journal 3(2)):

    D[m, j] = min_{i < j} D[m−1, i] + cost(i, j)

where ``D[m, j]`` is the least within-group sum of squares of the first ``j``
values split into ``m`` groups and ``cost(i, j)`` that of the run ``i..j−1``
(O(1) from prefix sums). The optimal split point is non-decreasing in ``j``, so
each layer is filled by divide and conquer: the middle column is solved, and its
split point bounds the search on either side. Every level of that recursion is
evaluated for all sub-problems at once with numpy, so Python does
O(k · log n) steps of O(n) vectorised work each.

Equal values always land in the same group: the programme runs on the distinct
values weighted by their counts. With fewer distinct values than ``k`` every
distinct value is its own group, and fewer than ``k`` groups are returned.
"""

from __future__ import annotations

import numpy as np

from .errors import CoreError
from .validation import check_whole


def kmeans_1d(x, k: int) -> tuple[np.ndarray, np.ndarray, float]:
    """Globally optimal k-means of 1-D data.

    Returns ``(labels, centres, cost)``: ``labels`` (n,) in input order, ``0`` for the
    group with the smallest centre; ``centres`` ascending, one per group (at most
    ``min(k, distinct values)`` groups); ``cost`` the within-group sum of squares.
    """
    values = np.asarray(x, dtype=float).reshape(-1)
    if values.size == 0:
        raise CoreError("cannot group an empty set of values", "records")
    if not np.isfinite(values).all():
        raise CoreError("values contain NaN or infinity", "records")
    k = check_whole(k, "k", 1)

    uniq, inverse, counts = np.unique(values, return_inverse=True, return_counts=True)
    inverse = inverse.reshape(-1)
    m = uniq.shape[0]
    k_eff = min(int(k), m)
    if k_eff == m:
        starts = np.arange(m)
    else:
        starts = _optimal_starts(uniq, counts.astype(float), k_eff)
    # group of each distinct value, then of each record
    group_of_unique = np.zeros(m, dtype=np.intp)
    group_of_unique[starts[1:]] = 1
    group_of_unique = np.cumsum(group_of_unique)
    labels = group_of_unique[inverse]
    sizes = np.bincount(labels, minlength=k_eff).astype(float)
    centres = np.bincount(labels, weights=values, minlength=k_eff) / sizes
    cost = float(np.sum((values - centres[labels]) ** 2))
    return labels, centres, cost


def _optimal_starts(u: np.ndarray, w: np.ndarray, k: int) -> np.ndarray:
    """First index (into the sorted distinct values ``u``) of each of the ``k`` runs."""
    m = u.shape[0]
    # centre and scale first: prefix sums of squares then lose less to cancellation
    shift = np.dot(w, u) / w.sum()
    scale = float(np.max(np.abs(u - shift))) or 1.0
    v = (u - shift) / scale
    W = np.concatenate(([0.0], np.cumsum(w)))
    S1 = np.concatenate(([0.0], np.cumsum(w * v)))
    S2 = np.concatenate(([0.0], np.cumsum(w * v * v)))
    # one group: D[1, j] = cost of the run 0..j−1 (D[1, 0] is never used)
    prev = np.full(m + 1, np.inf)
    prev[1:] = S2[1:] - S1[1:] ** 2 / W[1:]
    splits = np.zeros((k + 1, m + 1), dtype=np.int32 if m < 2**31 else np.int64)
    for layer in range(2, k):
        prev, splits[layer] = _layer(prev, W, S1, S2, layer, m)
    # the last layer needs one column only: all m values in k groups
    i = np.arange(k - 1, m)
    s = S1[m] - S1[i]
    last = np.argmin(prev[i] - S2[i] - s * s / (W[m] - W[i]))
    starts = np.empty(k, dtype=np.intp)
    starts[k - 1] = j = int(i[last])
    for layer in range(k - 1, 1, -1):
        j = int(splits[layer, j])
        starts[layer - 1] = j
    starts[0] = 0
    return starts


def _layer(
    prev: np.ndarray, W: np.ndarray, S1: np.ndarray, S2: np.ndarray, layer: int, m: int
) -> tuple[np.ndarray, np.ndarray]:
    """``D[layer, j]`` and its leftmost optimal split for ``j = layer..m``.

    Divide and conquer over monotone split points, one numpy pass per recursion
    level covering every open sub-problem of that level. With ``cost(i, j) =
    S2[j] − S2[i] − (S1[j] − S1[i])² / (W[j] − W[i])`` the term ``S2[j]`` is the
    same for every candidate ``i`` of a column, so it is added after the minimum.
    """
    base = prev - S2  # D[layer−1, i] − S2[i]
    cur = np.full(m + 1, np.inf)
    arg = np.zeros(m + 1, dtype=np.int64)
    # open sub-problems: columns jlo..jhi, split points searched in olo..ohi
    jlo = np.array([layer], dtype=np.int64)
    jhi = np.array([m], dtype=np.int64)
    olo = np.array([layer - 1], dtype=np.int64)
    ohi = np.array([m - 1], dtype=np.int64)
    while jlo.size:
        mid = (jlo + jhi) // 2
        lens = np.minimum(ohi, mid - 1) - olo + 1
        offsets = np.concatenate(([0], np.cumsum(lens)[:-1]))
        seg = np.repeat(np.arange(mid.size), lens)
        cand = np.arange(int(lens.sum())) + np.repeat(olo - offsets, lens)
        s = np.repeat(S1[mid], lens) - S1[cand]
        vals = base[cand] - s * s / (np.repeat(W[mid], lens) - W[cand])
        best_val = np.minimum.reduceat(vals, offsets)
        hit = np.flatnonzero(vals <= np.repeat(best_val, lens))
        first = hit[np.concatenate(([True], seg[hit[1:]] != seg[hit[:-1]]))]
        best = cand[first]
        cur[mid] = best_val + S2[mid]
        arg[mid] = best
        left = mid > jlo
        right = mid < jhi
        jlo, jhi, olo, ohi = (
            np.concatenate((jlo[left], mid[right] + 1)),
            np.concatenate((mid[left] - 1, jhi[right])),
            np.concatenate((olo[left], best[right])),
            np.concatenate((best[left], ohi[right])),
        )
    return cur, arg
