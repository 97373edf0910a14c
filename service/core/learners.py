"""Learners: fitted metrics from summed batch statistics, O(d³), no raw records.

STUB — the contract; implementation pending.
"""

from __future__ import annotations

from .metric import FittedMetric
from .stats import BatchStats

METHODS = ("closed_form", "discriminant", "diagonal", "euclidean")


def fit_metric(
    stats: BatchStats,
    method: str = "closed_form",
    alpha: float = 1e-3,
    max_rank: int | None = None,
    rel_tol: float = 1e-8,
) -> FittedMetric:
    """Fit one learner from summed statistics (see METHOD.md)."""
    raise NotImplementedError
