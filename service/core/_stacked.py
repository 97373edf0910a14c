"""k-means on many small problems at once: the held-out grouping of cross-validation.

Cross-validation groups every held-out batch once per candidate metric (learner × α,
plus the baselines), each with a few k-means++ restarts: hundreds of k-means runs
on ~50–500 records. One scikit-learn ``KMeans`` call costs ~3 ms at that size, almost
all of it per-call overhead, so here the candidates of one held-out batch and their
restarts are stacked into one array and run together: each step below is one numpy
operation over all of them.

The algorithm is scikit-learn's (the reference in the tests): greedy k-means++
seeding with ``2 + ⌊ln k⌋`` local trials per centre (Arthur & Vassilvitskii 2007),
then Lloyd iterations until no label changes (scikit-learn's ``tol=0``; its default
tolerance stops a little earlier when centres barely move). Two deliberate
differences: a centre
whose group empties keeps its place (scikit-learn moves it to a far record; with
k-means++ seeds this is rare), and the random numbers are drawn once per restart
and shared by every stacked problem, so candidates are compared on common random
numbers and a candidate's result does not depend on which others are stacked with
it. It does depend on its own shape: zero columns added as padding change the last
bits of the distances, which matters at exact ties (duplicate records), so
cross-validation pads each candidate to a width set by its own rank alone.
"""

from __future__ import annotations

import math

import numpy as np

MAX_ITER = 300  # scikit-learn's default; small problems converge in a handful
# elements of the stacked (problems × records × columns) array per chunk
CHUNK_ELEMENTS = 1 << 21


def kmeans_stacked(
    Z: np.ndarray,
    k: int,
    n_init: int,
    seed,
    max_iter: int = MAX_ITER,
) -> tuple[np.ndarray, np.ndarray]:
    """Best-of-``n_init`` k-means of each problem in ``Z`` (P × n × r), at ``k``.

    Returns ``(labels (P × n), inertia (P,))``. ``seed`` feeds
    ``numpy.random.default_rng``; the same seed gives the same result for a problem
    whatever else is stacked with it. Requires ``2 ≤ k ≤ n``.
    """
    P, n, r = Z.shape
    # centred per problem: k-means ignores location, and ‖z‖² − 2zᵀc + ‖c‖² would lose
    # the spread's digits to a large common offset
    Z = Z - Z.mean(axis=1, keepdims=True)
    rng = np.random.default_rng(seed)
    first = rng.integers(n, size=n_init)
    trials = 2 + int(math.log(k))
    draws = rng.random((k - 1, n_init, trials))
    step = chunk_size(n, r, n_init, k)
    labels = np.empty((P, n), dtype=np.intp)
    inertia = np.empty(P)
    for lo in range(0, P, step):
        part = Z[lo : lo + step]
        lab, cost = _best_of(part, k, first, draws, max_iter)
        labels[lo : lo + step], inertia[lo : lo + step] = lab, cost
    return labels, inertia


def chunk_size(n: int, r: int, n_init: int, k: int) -> int:
    """How many problems of n records × r columns to stack at once (bounded memory:
    the records, and the records × centres of every restart)."""
    return max(1, CHUNK_ELEMENTS // max(n * max(r, n_init * k, 1), 1))


def _best_of(Z, k, first, draws, max_iter) -> tuple[np.ndarray, np.ndarray]:
    sq = np.einsum("pnr,pnr->pn", Z, Z)  # ‖z‖², P × n
    centres = _seed(Z, sq, k, first, draws)  # P × (R·k) × r, restart-major
    labels, cost = _lloyd(Z, sq, centres, k, max_iter)  # P × n × R, P × R
    best = np.argmin(cost, axis=1)  # the first of equal costs, as scikit-learn keeps
    rows = np.arange(Z.shape[0])
    return labels[rows, :, best], cost[rows, best]


def _sq_dist(Z: np.ndarray, sq: np.ndarray, C: np.ndarray) -> np.ndarray:
    """Squared distances P × n × m between records (P × n × r) and points C (P × m × r)."""
    d2 = np.matmul(Z, np.swapaxes(C, 1, 2))
    d2 *= -2.0
    d2 += sq[:, :, None]
    d2 += np.einsum("pmr,pmr->pm", C, C)[:, None, :]
    return np.maximum(d2, 0.0, out=d2)


def _seed(Z, sq, k, first, draws) -> np.ndarray:
    """Greedy k-means++ centres for every problem and restart: P × (R·k) × r."""
    P, n, r = Z.shape
    R, T = first.shape[0], draws.shape[2]
    prow = np.arange(P)[:, None]
    prow3, rrow = prow, np.arange(R)[None, :]  # index grids (P × R) for the picks
    chosen = np.empty((P, R, k), dtype=np.intp)
    chosen[:, :, 0] = first[None, :]
    closest = np.swapaxes(_sq_dist(Z, sq, Z[:, first]), 1, 2)  # P × R × n
    for c in range(1, k):
        cum = np.cumsum(closest, axis=-1)  # P × R × n
        targets = draws[c - 1][None] * cum[..., -1:]  # P × R × T
        # the first record whose cumulative potential reaches the target (searchsorted)
        cand = (cum[:, :, None, :] < targets[..., None]).sum(axis=-1)
        cand = np.minimum(cand, n - 1).reshape(P, R * T)
        d2 = np.swapaxes(_sq_dist(Z, sq, Z[prow, cand]), 1, 2).reshape(P, R, T, n)
        pooled = np.minimum(closest[:, :, None, :], d2)
        pick = np.argmin(pooled.sum(axis=-1), axis=-1)  # P × R
        chosen[:, :, c] = cand.reshape(P, R, T)[prow3, rrow, pick]
        closest = pooled[prow3, rrow, pick]
    return Z[prow, chosen.reshape(P, R * k)]


def _lloyd(Z, sq, centres, k, max_iter) -> tuple[np.ndarray, np.ndarray]:
    """Lloyd iterations from ``centres`` (P × (R·k) × r) until no label changes.

    Returns labels P × n × R and inertia P × R. A problem leaves the stack as soon
    as none of its restarts changes a label, so the slowest one does not set the
    pace for all. The nearest centre is found from ``‖c‖² − 2 zᵀc`` (``‖z‖²`` does
    not change the arg-min; it is added for the cost).
    """
    P, n, _ = Z.shape
    R = centres.shape[1] // k
    groups = np.arange(k)
    labels_out = np.empty((P, n, R), dtype=np.intp)
    cost_out = np.empty((P, R))
    active = np.arange(P)

    def finish(which: np.ndarray, labels: np.ndarray, score: np.ndarray) -> None:
        nearest = score.min(axis=-1)  # the labels are the arg-min of this score
        labels_out[active[which]] = labels
        cost_out[active[which]] = np.maximum(nearest + sq[which][:, :, None], 0.0).sum(axis=1)

    labels = None
    for _ in range(max_iter):
        score = _score(Z, centres).reshape(-1, n, R, k)
        new = np.argmin(score, axis=-1)  # A × n × R
        if labels is not None:
            done = (new == labels).all(axis=(1, 2))
            if done.any():
                finish(done, new[done], score[done])
                if done.all():
                    return labels_out, cost_out
                keep = ~done
                active, Z, sq, centres, new = (
                    active[keep], Z[keep], sq[keep], centres[keep], new[keep]
                )
        labels = new
        onehot = (labels[..., None] == groups).reshape(-1, n, R * k).astype(Z.dtype)
        counts = onehot.sum(axis=1)  # A × (R·k)
        sums = np.matmul(np.swapaxes(onehot, 1, 2), Z)  # A × (R·k) × r
        empty = counts == 0
        if empty.any():
            sums[empty] = centres[empty]
            counts[empty] = 1.0
        centres = sums / counts[..., None]
    score = _score(Z, centres).reshape(-1, n, R, k)
    finish(np.ones(active.size, dtype=bool), np.argmin(score, axis=-1), score)
    return labels_out, cost_out


def _score(Z: np.ndarray, centres: np.ndarray) -> np.ndarray:
    """``‖c‖² − 2 zᵀc`` for every record and centre: P × n × m."""
    out = np.matmul(Z, np.swapaxes(centres, 1, 2))
    out *= -2.0
    out += np.einsum("pmr,pmr->pm", centres, centres)[:, None, :]
    return out
