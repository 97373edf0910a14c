"""Batch statistics: they add, subtract and serialise exactly (docs/method.md, sufficient
statistics). Hand-built cases; no outside source needed beyond the definitions."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.core import BatchStats, CoreError, NotEnoughDataError


def _batch(rng: np.random.Generator, n: int, d: int, k: int) -> tuple[np.ndarray, np.ndarray]:
    X = rng.normal(size=(n, d)) * rng.uniform(0.5, 5.0, size=d) + rng.normal(size=d) * 10
    y = np.concatenate([np.arange(k), rng.integers(0, k, size=n - k)])
    return X, rng.permutation(y)


def _direct(X: np.ndarray, groups: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """G and H of stacked data whose groups are the given ones (definitions, by loops)."""
    G = np.zeros((X.shape[1], X.shape[1]))
    H = np.zeros_like(G)
    m = X.mean(axis=0)
    for x in X:
        G += np.outer(x - m, x - m)
    for g in np.unique(groups):
        rows = X[groups == g]
        H += len(rows) * np.outer(rows.mean(axis=0) - m, rows.mean(axis=0) - m)
    return G, H


def test_one_batch_matches_the_definitions() -> None:
    X = np.array([[0.0, 1.0], [2.0, 1.0], [4.0, 7.0], [6.0, 7.0]])
    s = BatchStats.from_batch(X, ["a", "a", "b", "b"])
    # hand-computed: mean (3, 4); group means (1, 1) and (5, 7)
    assert (s.n_batches, s.n, s.n_groups) == (1, 4, 2)
    assert_allclose(s.G, [[20.0, 24.0], [24.0, 36.0]])
    assert_allclose(s.H, [[16.0, 24.0], [24.0, 36.0]])
    assert_allclose(s.sums, [12.0, 16.0])
    assert_allclose(s.mean, [3.0, 4.0])


def test_two_batches_sum_to_the_stacked_batch_with_block_diagonal_groups() -> None:
    rng = np.random.default_rng(0)
    (X1, y1), (X2, y2) = _batch(rng, 30, 4, 3), _batch(rng, 20, 4, 2)
    total = BatchStats.from_batch(X1, y1) + BatchStats.from_batch(X2, y2)
    # each batch centred on its own mean, its groups kept apart: per-batch sums
    G1, H1 = _direct(X1, y1)
    G2, H2 = _direct(X2, y2)
    assert (total.n_batches, total.n, total.n_groups) == (2, 50, 5)
    assert_allclose(total.G, G1 + G2, rtol=1e-10)
    assert_allclose(total.H, H1 + H2, rtol=1e-10)
    assert_allclose(total.sums, np.vstack([X1, X2]).sum(axis=0))
    # the block-diagonal view: the stacked records after centring each batch, with
    # batch-qualified groups, give the same scatters
    stacked = np.vstack([X1 - X1.mean(0), X2 - X2.mean(0)])
    groups = np.concatenate([y1, y2 + 10])
    G, H = _direct(stacked, groups)
    assert_allclose(total.G, G, rtol=1e-10)
    assert_allclose(total.H, H, rtol=1e-10, atol=1e-9)


def test_removing_a_batch_restores_the_earlier_sums() -> None:
    rng = np.random.default_rng(1)
    parts = [BatchStats.from_batch(*_batch(rng, 25, 3, 3)) for _ in range(3)]
    two = BatchStats.sum(parts[:2])
    three = BatchStats.sum(parts)
    assert (three - parts[2]).allclose(two)
    assert (three - parts[0] - parts[1] - parts[2]).allclose(BatchStats.zeros(3))


def test_bytes_round_trip_exactly() -> None:
    rng = np.random.default_rng(2)
    s = BatchStats.sum(BatchStats.from_batch(*_batch(rng, 40, 5, 4)) for _ in range(2))
    back = BatchStats.from_bytes(s.to_bytes())
    assert (back.n_batches, back.n, back.n_groups) == (s.n_batches, s.n, s.n_groups)
    for a, b in ((back.G, s.G), (back.H, s.H), (back.sums, s.sums)):
        assert a.tobytes() == b.tobytes()  # bit for bit
    with pytest.raises(CoreError):
        BatchStats.from_bytes(s.to_bytes()[:-8])
    with pytest.raises(CoreError):
        BatchStats.from_bytes(b"XXXX" + s.to_bytes()[4:])


@pytest.mark.parametrize(
    ("X", "groups", "error", "field"),
    [
        ([[0.0, np.nan], [1.0, 2.0]], [0, 1], CoreError, "records"),
        ([[0.0, np.inf], [1.0, 2.0]], [0, 1], CoreError, "records"),
        ([[0.0, 1.0], [1.0]], [0, 1], CoreError, "records"),
        ([[0.0, 1.0], [1.0, 2.0], [3.0, 1.0]], [0, 0, 0], NotEnoughDataError, "groups"),
        ([[0.0, 1.0]], [0], NotEnoughDataError, "records"),
        ([[0.0, 1.0], [1.0, 2.0]], [0, 1, 1], CoreError, "groups"),
        ([[0.0, 1.0], [1.0, 2.0]], [None, "a"], CoreError, "groups"),
        ([[0.0, 1.0], [1.0, 2.0]], [0.5, np.nan], CoreError, "groups"),
    ],
    ids=["nan", "inf", "ragged", "one-group", "one-record", "label-count", "unsortable-labels",
         "nan-label"],
)
def test_invalid_batches_raise_domain_errors(X, groups, error, field) -> None:
    with pytest.raises(error) as info:
        BatchStats.from_batch(X, groups)
    assert info.value.field == field


def test_adding_statistics_with_other_feature_counts_fails() -> None:
    a = BatchStats.from_batch([[0.0, 1.0], [1.0, 0.0]], [0, 1])
    b = BatchStats.from_batch([[0.0, 1.0, 2.0], [1.0, 0.0, 2.0]], [0, 1])
    with pytest.raises(CoreError) as info:
        a + b
    assert info.value.field == "features"
    with pytest.raises(CoreError):
        a - b


def test_nan_or_infinity_anywhere_in_a_large_batch_is_named() -> None:
    # the scan for non-finite values happens after XᵀX (whose diagonal catches them);
    # every position of a batch large enough for the BLAS path must still be caught
    rng = np.random.default_rng(5)
    X = rng.normal(size=(300, 7))
    groups = rng.integers(0, 3, size=300)
    for bad in (np.nan, np.inf, -np.inf):
        for row, col in ((0, 0), (299, 6), (137, 3)):
            Y = X.copy()
            Y[row, col] = bad
            with pytest.raises(CoreError, match=f"row {row}, column {col}") as info:
                BatchStats.from_batch(Y, groups)
            assert info.value.field == "records"


def test_nan_is_named_before_the_group_checks() -> None:
    # a batch wrong twice (NaN and a single group): the records' error comes first,
    # as the order of the checks promises
    with pytest.raises(CoreError, match="NaN or infinity") as info:
        BatchStats.from_batch([[np.nan, 1.0], [0.0, 2.0]], [0, 0])
    assert info.value.field == "records"
