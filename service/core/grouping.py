"""Grouping new records with a fitted metric.

Records are mapped into the learned space (``z = L · ((x − mean) / scales)``) and
grouped by k-means there: k-means++ with several restarts and a fixed seed, so the
same input always gives the same output. A rank-1 map groups with the exact
one-dimensional solver (:func:`service.core.optimal1d.kmeans_1d`), the global
optimum. Groups are numbered in order of their first record.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .clustering import cluster, overflowing_row, own_and_runner_up, single_threaded
from .errors import CoreError, RecordOverflowError
from .kchoice import choose_k
from .metric import FittedMetric
from .validation import check_k, check_matrix, check_whole


@dataclass(frozen=True, eq=False)
class Grouping:
    """The result of grouping records.

    ``k`` is the number of groups formed: the requested (or chosen) k, or fewer when
    the records hold fewer distinct points in the learned space (a rank-0 metric maps
    every record to one point: one group). With a single group there is no
    second-nearest centre and every margin is ``+inf``.
    """

    k: int
    labels: np.ndarray  # (n,) int, 0..k-1, numbered by first appearance
    distances: np.ndarray  # (n,) distance to own centre in the learned space
    margins: np.ndarray  # (n,) distance to 2nd-nearest centre minus own distance (≥ 0)
    sizes: np.ndarray  # (k,) records per group
    k_chosen: bool = False  # True when k was chosen by the metric's k rule


def group_records(
    metric: FittedMetric,
    X,
    k: int | None = None,
    random_state: int | None = 0,
    n_init: int = 10,
    init=None,
) -> Grouping:
    """Group records (n × d, raw units) with ``metric``.

    ``k`` None chooses k with the metric's calibrated rule (``metric.k_rule``).
    ``init`` optional initial centres (k × rank) in the learned space: one k-means
    run from them instead of k-means++ restarts (ignored by the exact rank ≤ 1 paths).
    """
    X = check_matrix(X, "records", metric.n_features)
    n_init = check_whole(n_init, "n_init", 1)
    with single_threaded():  # see clustering.single_threaded
        return _group(metric, X, k, random_state, int(n_init), init)


def _group(
    metric: FittedMetric, X: np.ndarray, k: int | None, random_state: int | None, n_init: int, init
) -> Grouping:
    n = X.shape[0]
    with np.errstate(over="ignore", invalid="ignore"):
        Z = metric.transform(X)
    row = overflowing_row(Z)
    if row is not None:
        raise RecordOverflowError(
            f"records are too large to map (row {row} overflows in the learned space)", row
        )
    chosen = k is None
    if chosen:
        k = choose_k(Z, metric.k_rule, random_state)
    k = check_k(k, n)
    if init is not None:
        init = check_matrix(init, "init", Z.shape[1])
        if init.shape[0] != k:
            raise CoreError(f"init has {init.shape[0]} centre(s) for k={k}", "init")
    labels, centres, _ = cluster(Z, k, random_state=random_state, n_init=n_init, init=init)
    own, other = own_and_runner_up(Z, centres, labels)
    margins = np.maximum(other - own, 0.0)
    sizes = np.bincount(labels, minlength=centres.shape[0])
    return Grouping(
        k=int(centres.shape[0]),
        labels=labels,
        distances=own,
        margins=margins,
        sizes=sizes,
        k_chosen=chosen,
    )


def grouping_of(metric: FittedMetric, X: np.ndarray, labels: np.ndarray) -> Grouping:
    """Records ``X`` (already checked) in the groups ``labels`` give them, seen through
    ``metric``: each group's centre is its records' mean in the learned space, then
    distances and margins as :func:`group_records` reports them (at the end of k-means
    its centres are these means). Groups are renumbered by first appearance; empty
    ones are dropped."""
    with np.errstate(over="ignore", invalid="ignore"):
        Z = metric.transform(np.asarray(X, dtype=float))
    labels = np.asarray(labels, dtype=np.intp)
    first = np.full(int(labels.max()) + 1, labels.size)
    np.minimum.at(first, labels, np.arange(labels.size))
    used = np.flatnonzero(first < labels.size)
    order = used[np.argsort(first[used], kind="stable")]
    new_id = np.empty(first.size, dtype=np.intp)
    new_id[order] = np.arange(order.size)
    labels = new_id[labels]
    onehot = labels[None, :] == np.arange(order.size)[:, None]  # k × n
    sizes = onehot.sum(axis=1)
    centres = (onehot @ Z) / sizes[:, None]
    own, other = own_and_runner_up(Z, centres, labels)
    return Grouping(k=int(order.size), labels=labels, distances=own,
                    margins=np.maximum(other - own, 0.0), sizes=sizes)
