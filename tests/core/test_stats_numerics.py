"""Numerical safety of the batch statistics shortcut (G = XᵀX − n·x̄x̄ᵀ).

Reference: the two-pass (centre first) scatter, which is translation invariant by
construction; the check is that a large common offset does not leak into G or H.
Data: scikit-learn's bundled wine set (UCI, Forina et al.).
"""

from __future__ import annotations

import numpy as np
from numpy.testing import assert_allclose
from sklearn.datasets import load_wine

from service.core import BatchStats


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
