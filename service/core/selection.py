"""Cross-validation over batches and the choice of learner and α.

STUB — the contract; implementation pending.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from .metric import FittedMetric
from .stats import BatchStats

Batch = tuple[np.ndarray, np.ndarray]  # (records n×d raw units, group labels n)


class MetricSelector:
    """Choose learner and α by K-fold cross-validation over batches, then refit on all.

    Parameters are stored only; ``fit`` returns self with ``metric_`` (FittedMetric,
    with its calibrated ``k_rule``) and ``report_`` (JSON-safe dict, see module doc).
    """

    def __init__(
        self,
        method: str = "auto",
        alphas: Sequence[float] | None = None,
        n_folds: int = 5,
        max_rank: int | None = None,
        k_max: int = 10,
        random_state: int | None = 0,
        progress: Callable[[str, float], None] | None = None,
    ) -> None:
        self.method = method
        self.alphas = alphas
        self.n_folds = n_folds
        self.max_rank = max_rank
        self.k_max = k_max
        self.random_state = random_state
        self.progress = progress

    def fit(
        self, batches: Sequence[Batch], stats: Sequence[BatchStats] | None = None
    ) -> MetricSelector:
        raise NotImplementedError

    def evaluate(self, method: str, alpha: float) -> dict[str, Any]:
        """Held-out scores of a fixed (method, α) on the folds used by ``fit``."""
        raise NotImplementedError


def select_metric(batches, stats=None, **params) -> tuple[FittedMetric, dict[str, Any]]:
    sel = MetricSelector(**params).fit(batches, stats)
    return sel.metric_, sel.report_
