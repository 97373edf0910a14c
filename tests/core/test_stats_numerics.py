"""Numerical safety of the batch statistics shortcut (G = XᵀX − n·x̄x̄ᵀ).

Reference: the two-pass (centre first) scatter, which is translation invariant by
construction; the check is that a large common offset does not leak into G or H.
Data: scikit-learn's bundled wine set (UCI, Forina et al.).
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from sklearn.datasets import load_wine

from service.core import BatchStats
from service.core.stats import without


def _two_pass(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    c = X - X.mean(axis=0)
    H = np.zeros((X.shape[1], X.shape[1]))
    for g in np.unique(y):
        m = c[y == g].mean(axis=0)
        H += (y == g).sum() * np.outer(m, m)
    return c.T @ c, H


def test_shortcut_matches_two_pass_scatter():
    X, y = load_wine(return_X_y=True)
    stats = BatchStats.from_batch(X, y)
    G, H = _two_pass(X, y)
    assert_allclose(stats.G, G, rtol=1e-9, atol=1e-6)
    assert_allclose(stats.H, H, rtol=1e-9, atol=1e-6)


def test_large_offset_does_not_leak_into_the_scatter():
    X, y = load_wine(return_X_y=True)
    shifted = BatchStats.from_batch(X + 1e7, y)
    G, H = _two_pass(X, y)
    assert_allclose(shifted.G, G, rtol=1e-7, atol=1e-4)
    assert_allclose(shifted.H, H, rtol=1e-7, atol=1e-4)


def test_sparse_and_string_labels_give_the_same_statistics():
    X, y = load_wine(return_X_y=True)
    as_int = BatchStats.from_batch(X, y * 1000)  # sparse integer labels: the sort path
    as_str = BatchStats.from_batch(X, np.array([f"c{v}" for v in y]))
    compact = BatchStats.from_batch(X, y)
    assert as_int.allclose(compact) and as_str.allclose(compact)


def test_huge_offset_keeps_the_between_group_scatter():
    # offsets like epoch milliseconds (~1e12) are real data; the group sums cancel as
    # badly as G does, so they must be taken from centred records too. Reference: the
    # two-pass scatter of the same (shifted) matrix. Tolerance: relative to the
    # features' spread, a few hundred roundings (our choice, no source).
    X, y = load_wine(return_X_y=True)
    X = X + 1e10
    stats = BatchStats.from_batch(X, y)
    G, H = _two_pass(X, y)
    unit = np.sqrt(np.outer(np.diag(G), np.diag(G)))
    assert np.max(np.abs(stats.G - G) / unit) < 1e-8
    assert np.max(np.abs(stats.H - H) / unit) < 1e-8


def test_extreme_integer_labels_do_not_overflow():
    X, y = load_wine(return_X_y=True)
    compact = BatchStats.from_batch(X, y)
    near_top = np.uint64(2**64 - 5) + y.astype(np.uint64)  # labels ≥ 2**63
    tiny_type = np.where(y == 0, -100, np.where(y == 1, 0, 100)).astype(np.int8)
    assert BatchStats.from_batch(X, near_top).allclose(compact)
    assert BatchStats.from_batch(X, tiny_type).allclose(compact)


def test_removing_a_batch_that_dwarfs_a_feature_keeps_the_rest_exact():
    # feature 2 varies ~1e-4 in three batches and ~1e6 in the fourth: total − fourth
    # would keep only rounding noise of that feature. Reference: the other batches
    # summed directly. Tolerance: relative, a few hundred roundings (our choice).
    rng = np.random.default_rng(0)
    parts = []
    for b in range(4):
        y = np.arange(60) % 3
        X = rng.normal(size=(60, 3))
        X[:, 0] += 3.0 * y
        X[:, 2] = rng.normal(size=60) * (1e6 if b == 1 else 1e-4)
        parts.append(BatchStats.from_batch(X, y))
    total = BatchStats.sum(parts)
    kept = [parts[i] for i in (0, 2, 3)]
    direct = BatchStats.sum(kept)
    naive = total - parts[1]
    rest = without(total, parts[1], lambda: BatchStats.sum(kept))
    assert abs(naive.G[2, 2] - direct.G[2, 2]) > 1e-3 * direct.G[2, 2]  # the trap is real
    assert_allclose(np.diag(rest.G), np.diag(direct.G), rtol=1e-12)
    assert_allclose(rest.H, direct.H, rtol=1e-12, atol=1e-12 * np.abs(direct.H).max())
    # and an ordinary removal stays the O(d²) subtraction
    assert without(total, parts[0], lambda: pytest.fail("summed needlessly")).allclose(
        BatchStats.sum(parts[1:])
    )


def test_a_constant_feature_has_exactly_zero_scatter():
    # whatever its value and the batch size, so that "no spread" never depends on
    # rounding in the mean (the sum of 10⁵ copies of 0.1, divided back, is not 0.1)
    rng = np.random.default_rng(1)
    n = 100_000
    for value in (0.1, 12345.678, 1e12 + 0.1):
        X = np.c_[rng.normal(size=n), np.full(n, value)]
        stats = BatchStats.from_batch(X, np.arange(n) % 3)
        assert stats.G[1, 1] == 0.0 and stats.H[1, 1] == 0.0
        assert np.all(stats.G[1] == 0.0) and np.all(stats.H[1] == 0.0)


def test_an_offset_whose_squares_overflow_still_gives_the_centred_scatter() -> None:
    # the centred scatters are translation-invariant (a fact of the definitions): a
    # batch moved by 1e155, whose uncentred XᵀX overflows float64 (squares > 1e308),
    # has the same G and H; its spread (1e148) keeps ~9 digits at that offset
    rng = np.random.default_rng(7)
    X = rng.normal(size=(30, 4)) * 1e148
    y = np.repeat([0, 1, 2], 10)
    near, far = BatchStats.from_batch(X, y), BatchStats.from_batch(X + 1e155, y)
    assert np.isfinite(far.G).all() and np.isfinite(far.H).all()
    np.testing.assert_allclose(far.G, near.G, rtol=1e-6, atol=1e-6 * np.abs(near.G).max())
    np.testing.assert_allclose(far.H, near.H, rtol=1e-6, atol=1e-6 * np.abs(near.H).max())
