"""Input checks at the public edge of the core. Private helpers assume valid arrays."""

from __future__ import annotations

import numpy as np

from .errors import CoreError, NotEnoughDataError


def check_matrix(
    X, field: str = "records", n_features: int | None = None, finite: bool = True
) -> np.ndarray:
    """A finite 2-D float64 matrix, with ``n_features`` columns when given.

    ``finite=False`` leaves the scan for NaN and infinity to the caller (one that
    reads every value anyway and calls again with ``finite=True`` when it finds one).
    """
    try:
        arr = np.asarray(X, dtype=float)
    except (ValueError, TypeError) as exc:
        raise CoreError(f"{field} must be a rectangular matrix of numbers ({exc})", field) from exc
    if arr.ndim != 2:
        raise CoreError(f"{field} must be a 2-D matrix, got {arr.ndim} dimension(s)", field)
    if arr.shape[0] == 0:
        raise NotEnoughDataError(f"{field} is empty", field)
    if n_features is not None and arr.shape[1] != n_features:
        raise CoreError(
            f"{field} has {arr.shape[1]} feature(s), expected {n_features}", field
        )
    if finite and not np.isfinite(arr).all():
        bad = np.argwhere(~np.isfinite(arr))[0]
        raise CoreError(
            f"{field} contains NaN or infinity (first at row {bad[0]}, column {bad[1]})", field
        )
    return arr


def check_batch(X, groups, n_features: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Validate a labelled batch; returns the matrix and group codes 0..k-1."""
    arr = check_matrix(X, "records", n_features)
    return arr, check_groups(arr, groups)


def check_batches_at_once(batches: list) -> list[tuple[np.ndarray, np.ndarray]] | None:
    """What :func:`check_batch` gives each batch, for many batches in a few
    whole-array passes, when they are the common kind (float64 matrices of one width,
    whole-number labels, nothing wrong); None otherwise, and the caller's loop of
    ``check_batch`` then names the first problem. Codes are :func:`_group_codes`'s:
    0..k-1 in sorted label order, here ranked within each batch in one sort."""
    try:
        if not all(type(item) in (tuple, list) and len(item) == 2 for item in batches):
            return None
        Xs = [item[0] for item in batches]
        ys = [item[1] for item in batches]
    except TypeError:
        return None
    if not all(type(X) is np.ndarray and X.dtype == np.float64 and X.ndim == 2 for X in Xs) \
            or not all(type(y) is np.ndarray and y.dtype.kind in "iu" and y.ndim == 1
                       for y in ys):
        return None
    d = Xs[0].shape[1]
    ns = np.fromiter((X.shape[0] for X in Xs), dtype=np.int64, count=len(Xs))
    if any(X.shape[1] != d for X in Xs) or d == 0 or ns.min() < 2 \
            or not np.array_equal(ns, [y.shape[0] for y in ys]):
        return None
    if not all(np.isfinite(X).all() for X in Xs):  # no copy of every batch at once
        return None
    labels = np.concatenate(ys)
    if labels.dtype.kind not in "iu":  # int64 with uint64 labels promotes to float
        return None
    if labels.dtype.kind == "u" and labels.size and int(labels.max()) >= 2**62:
        return None
    labels = labels.astype(np.int64)
    lo, hi = int(labels.min()), int(labels.max())
    span = hi - lo + 1
    if span * len(Xs) >= 2**62:
        return None
    batch = np.repeat(np.arange(len(Xs), dtype=np.int64), ns)
    keys, codes = np.unique(batch * span + (labels - lo), return_inverse=True)
    first = np.searchsorted(keys, np.arange(len(Xs), dtype=np.int64) * span)
    codes = codes.reshape(-1) - first[batch]
    starts = np.concatenate(([0], np.cumsum(ns)[:-1]))
    if np.maximum.reduceat(codes, starts).min() < 1:
        return None  # a batch with one group: the loop names it
    codes = codes.astype(np.intp)
    return [(X, c) for X, c in zip(Xs, np.split(codes, starts[1:]), strict=True)]


def check_groups(arr: np.ndarray, groups) -> np.ndarray:
    """Group codes 0..k-1 for the records of ``arr`` (a matrix checked already)."""
    labels = np.asarray(groups)
    if labels.ndim != 1:
        raise CoreError("groups must be a flat list of labels", "groups")
    if labels.shape[0] != arr.shape[0]:
        raise CoreError(
            f"groups has {labels.shape[0]} label(s) for {arr.shape[0]} record(s)", "groups"
        )
    if arr.shape[0] < 2:
        raise NotEnoughDataError("a batch needs at least two records", "records")
    if labels.dtype.kind in "fc" and not np.isfinite(labels).all():
        raise CoreError("groups contain NaN or infinity", "groups")
    try:
        codes = _group_codes(labels)
    except TypeError as exc:  # e.g. None among text labels: no order to sort them by
        raise CoreError(f"groups must be labels of one kind ({exc})", "groups") from exc
    if codes.max() < 1:
        raise NotEnoughDataError("a batch needs at least two groups", "groups")
    return codes.astype(np.intp)


def _group_codes(labels: np.ndarray) -> np.ndarray:
    """Codes 0..k-1 in sorted label order; O(n) for compact integer labels."""
    n = labels.shape[0]
    if labels.dtype.kind in "iu":
        lo, hi = int(labels.min()), int(labels.max())
        if hi - lo <= 2 * n:
            # widen first (int8 differences overflow), keep unsigned unsigned (a cast
            # of labels ≥ 2**63 to int64 overflows); the range is ≤ 2n, so it fits
            wide = labels.astype(np.int64 if labels.dtype.kind == "i" else np.uint64)
            offset = (wide - wide.min()).astype(np.intp)
            present = np.bincount(offset) > 0
            return (np.cumsum(present) - 1)[offset]
    _, codes = np.unique(labels, return_inverse=True)
    return codes.reshape(-1)


def check_whole(value, field: str, minimum: int) -> int:
    """A whole number (Python or numpy integer, not a bool) of at least ``minimum``."""
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, np.integer))
        or value < minimum
    ):
        raise CoreError(f"{field} must be a whole number of at least {minimum}", field)
    return int(value)


def check_k(k, n_records: int) -> int:
    k = check_whole(k, "k", 1)
    if k > n_records:
        raise CoreError(f"k={k} is larger than the number of records ({n_records})", "k")
    return k
