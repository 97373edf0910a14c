"""Curves over k that the rules for unknown k read: W_k, silhouette, Calinski–Harabasz.

One grouping per k in 1..k_max, all from a single Ward hierarchy: cutting the tree
gives a partition for every k at once, and a few Lloyd (k-means) iterations from
each cut refine it to a k-means local optimum. Ward's merge criterion is the
increase of the within-group sum of squares, the k-means objective, so its cuts are
good k-means starts. This is ~50× cheaper than a k-means++ run with restarts per k,
which matters because a fit calibrates the rule on every training batch.
Silhouettes come from one matrix of pairwise distances (scikit-learn's
``silhouette_score`` is the reference in the tests).

The inputs are small (tens to hundreds of records) and the curves are drawn many
times per fit, so the work for all k is done together (a *stack*): the groups of
k = 2, 3, … sit side by side, one segment of k rows per k, so one matrix product per
Lloyd iteration gives every k's centres and one more every record's squared distance
to all of them; one product with the distance matrix gives every silhouette. Each k
still follows its own Lloyd run and stops on its own.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
from scipy.cluster.hierarchy import linkage
from scipy.spatial.distance import pdist, squareform

from .clustering import single_threaded

SAMPLE_CAP = 1000  # records used to draw the curves (pairwise distances are O(n²))
LLOYD_ITERATIONS = 20
_ZERO_SPREAD = 1e-12  # W_k below this share of W_1 is rounding, not spread (our choice)
_BLOCK_ELEMENTS = 1 << 22  # bound on the temporary arrays of one batch of k values
_CACHE_ELEMENTS = 1 << 14  # temporaries this small stay in a core's cache


def curves(
    Z: np.ndarray,
    k_max: int,
    random_state: int | None = 0,
    sample_cap: int = SAMPLE_CAP,
    silhouette: bool = True,
) -> dict[str, np.ndarray]:
    """``inertia``, ``silhouette``, ``calinski_harabasz`` for k = 1..k_hi, and ``n``.

    Index 0 is k = 1. ``k_hi ≤ k_max`` stops where no more distinct groups form.
    A random subsample of ``sample_cap`` records (seeded) stands for larger inputs.
    ``silhouette`` False leaves that curve out, and with it the square matrix of
    distances it is read from: the other two follow from W_k alone, and the points
    they have are the same either way (the same computation).
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
    out = {"inertia": [total], "calinski_harabasz": [np.nan]}
    if silhouette:
        out["silhouette"] = [np.nan]
    k_hi = min(k_max, n)
    if k_hi >= 2 and total > 0 and Z.shape[1] > 0:
        with single_threaded():  # small matrices: BLAS threads cost more than they save
            _fill(out, Z, k_hi, total)
    result = {name: np.asarray(values, dtype=float) for name, values in out.items()}
    result["n"] = np.asarray(float(n))
    return result


def _fill(out: dict[str, list], Z: np.ndarray, k_hi: int, total: float) -> None:
    """Append the k = 2..k_hi points of the curves in ``out`` (stops early, see ``curves``)."""
    n = Z.shape[0]
    condensed = pdist(Z)
    dist = squareform(condensed) if "silhouette" in out else None
    starts = _cuts(linkage(condensed, method="ward"), n, k_hi)  # row k − 2: the cut at k
    k_hi = _distinct(starts, k_hi)  # the curves stop before a start with an empty group
    for ks in _batches(n, Z.shape[1], k_hi):
        stack = _Stack(ks, n)
        labels, within = _lloyd(Z, starts[ks - 2], stack)
        out["inertia"].extend(within.tolist())
        if dist is not None:
            out["silhouette"].extend(
                np.where(ks < n, _silhouettes(dist, labels, stack), np.nan).tolist()
            )
        for k, w in zip(ks.tolist(), within.tolist(), strict=True):
            # W_k at rounding level (fewer distinct points than k): every group is
            # tight, the ratio is infinite rather than noise over noise
            out["calinski_harabasz"].append(
                (total - w) / (k - 1) * (n - k) / w if w > _ZERO_SPREAD * total and k < n
                else np.inf
            )


def _distinct(starts: np.ndarray, k_hi: int) -> int:
    """The largest k ≤ k_hi such that no start up to k has an empty group.

    A cut of the tree never has one (fewer distinct points than k show up as groups
    that empty during the Lloyd iterations); the guard keeps the contract of
    ``_lloyd``, whose starts have k groups each.
    """
    ks = np.arange(2, k_hi + 1)
    offsets = np.cumsum(ks) - ks
    counts = np.bincount((starts + offsets[:, None]).ravel(), minlength=int(ks.sum()))
    if counts.min() > 0:
        return k_hi
    return int(np.argmax(np.minimum.reduceat(counts, offsets) == 0)) + 1


def _batches(n: int, r: int, k_hi: int) -> Iterator[np.ndarray]:
    """Consecutive k values 2..k_hi, grouped so one group's temporaries stay bounded."""
    start = 2
    while start <= k_hi:
        stop = start + 1
        # the largest temporaries: every record's distance to every centre (padded
        # to the widest k) and the residuals, n × r per k
        while stop <= k_hi and n * (stop - start + 1) * (stop + r) <= _BLOCK_ELEMENTS:
            stop += 1
        yield np.arange(start, stop)
        start = stop


class _Stack:
    """Groups of several k side by side: one segment of k rows per k, in order of k.

    Row ``offsets[j] + g`` stands for group g of the partition into ``ks[j]`` groups;
    partitions (one row of labels per k) plus ``base`` are stacked rows.
    """

    def __init__(self, ks: np.ndarray, n: int) -> None:
        self.ks = ks
        self.offsets = np.zeros(ks.size, dtype=np.intp)
        np.cumsum(ks[:-1], out=self.offsets[1:])
        self.base = self.offsets[:, None]
        self.size = int(ks.sum())
        self.rows = np.arange(n)
        self._grid: np.ndarray | None = None  # for argmin, made on first use

    def onehot(self, stacked: np.ndarray) -> np.ndarray:
        """Indicator matrix (Σk × n) of partitions given as stacked rows (k values × n)."""
        onehot = np.zeros((self.size, self.rows.size))
        onehot[stacked, self.rows] = 1.0
        return onehot

    def argmin(self, values: np.ndarray) -> np.ndarray:
        """Per k, each record's group of least value in ``values`` (n × Σk): the first
        such group, as ``np.argmin`` picks it.

        numpy's argmin over a short row per record and k costs more than the
        arithmetic, so the segments are copied into a grid (k values × widest k ×
        records, padded with +∞), one reduction over its contiguous rows gives each
        least value, and the group is the number of groups before the first that
        holds it, counted in one pass over the groups.
        """
        if self._grid is None:
            self._steps = self._prepare_argmin()
        grid = self._grid
        for j, offset, k in self._segments:
            grid[j, :k] = values[:, offset : offset + k].T
        least = np.minimum.reduce(grid, axis=1, out=self._least)
        if np.isnan(least).any():  # argmin takes the first NaN as the least value
            return grid.argmin(axis=1)
        self._before.fill(0)
        self._searching.fill(True)
        for column, least_j, other, searching, before in self._steps:
            np.not_equal(column, least_j, out=other)
            np.logical_and(searching, other, out=searching)
            np.add(before, searching, out=before)
        return self._before.astype(np.intp)

    def _prepare_argmin(self) -> list[tuple[np.ndarray, ...]]:
        """The grid and buffers of ``argmin``, and the views each of its steps reads."""
        width, shape = int(self.ks.max()), (self.ks.size, self.rows.size)
        self._grid = np.full((self.ks.size, width, self.rows.size), np.inf)
        self._segments = list(
            zip(range(self.ks.size), self.offsets.tolist(), self.ks.tolist(), strict=True)
        )
        self._least = np.empty(shape)
        self._before = np.zeros(shape, dtype=np.min_scalar_type(width))
        self._searching = np.ones(shape, dtype=bool)
        other = np.empty(shape, dtype=bool)
        # step g looks at group g of the k values that have a group after it (a
        # suffix: ks is increasing); a record of a smaller k has found its group
        after = np.searchsorted(self.ks, np.arange(1, width), side="right").tolist()
        return [
            (self._grid[j:, g], self._least[j:], other[j:], self._searching[j:],
             self._before[j:])
            for g, j in enumerate(after)
        ]


def _cuts(merges: np.ndarray, n: int, k_hi: int) -> np.ndarray:
    """Leaf labels of the Ward tree cut into exactly k groups, one row per k = 2..k_hi.

    Row k − 2 numbers the groups 0..k−1 in the order their roots appear among the
    children of the last k − 1 merges (the merges the cut undoes).
    """
    children = merges[:, :2].astype(np.intp)
    nodes = 2 * n - 1
    top = 2 * n - k_hi  # the nodes from here on are undone by the cut at k_hi
    # each leaf's root below the cut at k_hi (pointer jumping, vectorised)
    parent = np.empty(nodes, dtype=np.intp)
    parent[children.ravel()] = np.repeat(np.arange(n, nodes), 2)
    parent[-1] = nodes - 1
    up = np.where(parent < top, parent, np.arange(nodes))
    while True:
        higher = up[up]
        if np.array_equal(higher, up):
            break
        up = higher
    # the few nodes above: the roots at every k, top-down (splitting node x = 2n − k − 1
    # turns the roots at k into its two children followed by the other roots at k) …
    above = children[top - n :].tolist()  # above[x − top]: the children of node x
    roots = [above[-1]]  # k = 2
    for k in range(2, k_hi):
        x = 2 * n - k - 1
        roots.append(above[x - top] + [c for c in roots[-1] if c != x])
    # … and, bottom-up, the root at k above each root at k_hi (x merges its children)
    ancestors = roots[-1]
    table = [list(range(k_hi))]
    for k in range(k_hi - 1, 1, -1):
        x = 2 * n - k - 1
        left, right = above[x - top]
        ancestors = [x if c == left or c == right else c for c in ancestors]
        position = {c: i for i, c in enumerate(roots[k - 2])}
        table.append([position[c] for c in ancestors])
    slot = np.zeros(nodes, dtype=np.intp)
    slot[roots[-1]] = np.arange(k_hi)
    return np.array(table[::-1], dtype=np.intp)[:, slot[up[:n]]]


def _cut(merges: np.ndarray, n: int, k: int) -> np.ndarray:
    """Leaf labels 0..k−1 of the Ward tree cut into exactly k groups."""
    return _cuts(merges, n, k)[-1]


def _lloyd(Z: np.ndarray, starts: np.ndarray, stack: _Stack) -> tuple[np.ndarray, np.ndarray]:
    """``(labels, within)`` of Lloyd iterations from ``starts`` (a row per k in the stack).

    Every start has k groups. Each k stops when its labels no longer change, when a
    group empties (it keeps its last partition with k groups) or after
    ``LLOYD_ITERATIONS`` mean computations (the labels of the last one are final).
    A k whose labels stopped changing would keep them, so the k values that are done
    leave the stack (for a smaller one) only once half of them are.
    """
    full, ks, n = stack, stack.ks, Z.shape[0]
    sq = np.einsum("ij,ij->i", Z, Z)[:, None]
    twice = 2.0 * Z
    labels = starts.copy()  # final labels, written as k values leave the stack
    centres = np.empty((full.size, Z.shape[1]))  # final centres, stacked as in full
    work = np.arange(ks.size)  # the k values (rows of labels) in the stack
    into = np.arange(full.size)  # the rows of full that the stack's rows are
    lab = previous = starts
    # the indicator matrix of the stack's partitions (its first rows), zeroed again
    # after each use; ``cells`` are the positions of its ones
    indicator = np.zeros((full.size, n))
    ones = indicator.reshape(-1)
    iteration = 0
    while True:
        stacked = lab + stack.base
        counts = np.bincount(stacked.ravel(), minlength=stack.size)
        if counts.min() == 0:  # a group emptied: that k keeps its last partition
            emptied = np.minimum.reduceat(counts, stack.offsets) == 0
            labels[work[emptied]] = previous[emptied]
            work, lab, previous = work[~emptied], lab[~emptied], previous[~emptied]
            if not work.size:
                break
            stack, into = _Stack(ks[work], n), _into(full, work)
            continue
        cells = stacked * n + stack.rows
        ones[cells] = 1.0
        means = indicator[: stack.size] @ Z
        ones[cells] = 0.0
        means /= counts[:, None]
        centres[into] = means
        iteration += 1
        if iteration == LLOYD_ITERATIONS:
            break
        d2 = twice @ means.T  # ‖z‖² − 2zᵀc + ‖c‖², records × stacked centres
        np.subtract(sq, d2, out=d2)
        d2 += np.einsum("ij,ij->i", means, means)
        moved = stack.argmin(d2)
        changed = (moved != lab).any(axis=1)
        n_changed = np.count_nonzero(changed)
        if not n_changed:
            break
        lab, previous = moved, lab
        if n_changed <= changed.size // 2:
            labels[work] = lab
            work, lab, previous = work[changed], lab[changed], previous[changed]
            stack, into = _Stack(ks[work], n), _into(full, work)
    labels[work] = lab
    within = np.empty(ks.size)
    step = max(1, _CACHE_ELEMENTS // Z.size)  # residuals of a few k at a time
    for lo in range(0, ks.size, step):
        residuals = centres[labels[lo : lo + step] + full.base[lo : lo + step]]
        np.subtract(Z, residuals, out=residuals)
        residuals = residuals.reshape(residuals.shape[0], -1)
        within[lo : lo + step] = np.einsum("ij,ij->i", residuals, residuals)
    return labels, within


def _into(full: _Stack, work: np.ndarray) -> np.ndarray:
    """Rows of ``full`` that the rows of a stack of its k values ``work`` stand for."""
    ks = full.ks[work]
    return np.repeat(full.offsets[work] - np.cumsum(ks) + ks, ks) + np.arange(int(ks.sum()))


def _silhouettes(dist: np.ndarray, labels: np.ndarray, stack: _Stack) -> np.ndarray:
    """Mean silhouette of each partition (one row of ``labels`` per k in the stack).

    Defined as scikit-learn's ``silhouette_score`` computes it; one matrix product
    gives every record's distance sum to every group of every partition.
    """
    rows, n = stack.rows, stack.rows.size
    stacked = labels + stack.base
    onehot = stack.onehot(stacked)
    sums = onehot @ dist  # Σk × n: distance of each record to all records of each group
    counts = onehot.sum(axis=1, keepdims=True)
    own_n = counts[stacked, 0] - 1.0  # (k values, n)
    a = sums[stacked, rows] / np.maximum(own_n, 1.0)  # a record alone: 0 / 1
    mean_to = sums / counts
    mean_to[stacked, rows] = np.inf
    b = np.minimum.reduceat(mean_to, stack.offsets, axis=0)
    denom = np.maximum(a, b)
    # 0 for a record alone in its group, and where a = b = 0
    s = np.divide(b - a, denom, out=np.zeros(a.shape), where=(denom > 0) & (own_n > 0))
    return s.sum(axis=1) / n  # the mean, as s.mean(axis=1) computes it


def _silhouette(dist: np.ndarray, labels: np.ndarray, k: int) -> float:
    """Mean silhouette, defined as scikit-learn's ``silhouette_score`` computes it."""
    labels = np.asarray(labels)[None, :]
    return float(_silhouettes(dist, labels, _Stack(np.array([k]), labels.shape[1]))[0])
