"""k-means in the learned space, shared by grouping and the choice of k.

Private to the core: inputs are already validated, mapped records ``Z`` (n × r).
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator
from contextlib import AbstractContextManager, contextmanager, nullcontext
from functools import cache

import numpy as np
import sklearn
from sklearn.cluster import KMeans
from sklearn.exceptions import ConvergenceWarning
from threadpoolctl import ThreadpoolController

from .optimal1d import kmeans_1d

# rows per block when measuring distances to every centre (bounded memory)
_BLOCK_ELEMENTS = 1 << 22


@cache
def _threadpools() -> ThreadpoolController:
    return ThreadpoolController()  # inspects loaded libraries: once, on first use


def single_threaded(active: bool = True) -> AbstractContextManager:
    """Limit OpenMP and BLAS to one thread inside the block (no-op when not active).

    k-means and the small dense algebra of the core run on one thread: on a small
    machine shared with other processes, OpenMP/BLAS threads spin-waiting made
    k-means and fits several times slower, while on an idle machine they would gain
    at most the core count. A service runs one
    fit per worker process, so processes, not threads, use the cores.
    """
    return _threadpools().limit(limits=1) if active else nullcontext()


@contextmanager
def validated_inner_loop() -> Iterator[None]:
    """For loops over inputs the core validated already (cross-validation, k curves).

    scikit-learn re-validates parameters and finiteness on every call; in a loop of
    hundreds of small k-means runs and scores that was a large share of the time.
    ``sklearn.config_context`` switches those checks off inside the block only.
    """
    with sklearn.config_context(skip_parameter_validation=True, assume_finite=True):
        with single_threaded():
            yield


def cluster(
    Z: np.ndarray,
    k: int,
    random_state: int | None = 0,
    n_init: int = 10,
    init: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, float]:
    """``(labels, centres, inertia)`` of k-means on ``Z``, groups numbered by first appearance.

    * rank 0 (no columns): every record is the same point, one group;
    * rank 1: the exact solver (global optimum; ``init`` is not needed and ignored);
    * otherwise scikit-learn ``KMeans``: k-means++ with ``n_init`` restarts, or the
      given initial centres with a single run.

    Fewer than ``k`` groups come back when there are fewer than ``k`` distinct points.
    """
    n, r = Z.shape
    if r == 0 or k == 1:
        labels = np.zeros(n, dtype=np.intp)
        centres = Z.mean(axis=0, keepdims=True)
        return labels, centres, float(np.sum((Z - centres) ** 2))
    if r == 1:
        labels, centres, cost = kmeans_1d(Z[:, 0], k)
        return _by_first_appearance(labels, centres[:, None], cost)
    if init is not None:
        km = KMeans(n_clusters=k, init=init, n_init=1, random_state=random_state)
    else:
        km = KMeans(n_clusters=k, init="k-means++", n_init=n_init, random_state=random_state)
    with warnings.catch_warnings(), single_threaded():
        # duplicate points: fewer distinct groups than k, handled below
        warnings.simplefilter("ignore", ConvergenceWarning)
        km.fit(Z)
    return _by_first_appearance(
        np.asarray(km.labels_, dtype=np.intp), km.cluster_centers_, float(km.inertia_)
    )


def overflowing_row(Z: np.ndarray) -> int | None:
    """The first record (row) whose squared distances could overflow, else None.

    k-means and the distances work with squared distances between records, up to
    4·‖z‖²: they must stay finite, not only the mapped coordinates. ``Z``: records ×
    r, or stacked problems × records × r.
    """
    with np.errstate(over="ignore", invalid="ignore"):
        reach = 4.0 * np.einsum("...nr,...nr->...n", Z, Z)
    bad = ~np.isfinite(reach)
    return int(np.argwhere(bad)[0, -1]) if bad.any() else None


def _by_first_appearance(
    labels: np.ndarray, centres: np.ndarray, cost: float
) -> tuple[np.ndarray, np.ndarray, float]:
    """Renumber groups 0, 1, … in order of their first record; drop unused centres."""
    used, first = np.unique(labels, return_index=True)
    order = used[np.argsort(first)]
    new_id = np.empty(centres.shape[0], dtype=np.intp)
    new_id[order] = np.arange(order.size)
    return new_id[labels], centres[order], cost


def own_and_runner_up(
    Z: np.ndarray, centres: np.ndarray, labels: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Distance of each record to its own centre and to the nearest other centre.

    The nearest other centre is ``+inf`` when there is a single group.
    """
    n, r = Z.shape
    k = centres.shape[0]
    own = np.empty(n)
    other = np.full(n, np.inf)
    step = max(1, _BLOCK_ELEMENTS // max(k * max(r, 1), 1))
    rows = np.arange(n)
    for start in range(0, n, step):
        stop = min(n, start + step)
        diff = Z[start:stop, None, :] - centres[None, :, :]
        dist = np.sqrt(np.einsum("ikr,ikr->ik", diff, diff))
        idx = rows[: stop - start]
        lab = labels[start:stop]
        own[start:stop] = dist[idx, lab]
        if k > 1:
            dist[idx, lab] = np.inf
            other[start:stop] = dist.min(axis=1)
    return own, other
