"""Exact one-dimensional k-means (sorting + dynamic programming, O(k·n log n)).

STUB — the contract; implementation pending.
"""

from __future__ import annotations

import numpy as np


def kmeans_1d(x, k: int) -> tuple[np.ndarray, np.ndarray, float]:
    """Globally optimal k-means of 1-D data: (labels, centres sorted ascending, cost)."""
    raise NotImplementedError
