"""Grouping new records with a fitted metric.

STUB — the contract; implementation pending.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .metric import FittedMetric


@dataclass(frozen=True, eq=False)
class Grouping:
    k: int
    labels: np.ndarray  # (n,) int, 0..k-1
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
) -> Grouping:
    raise NotImplementedError
