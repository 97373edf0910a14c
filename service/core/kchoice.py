"""Choosing k when the caller does not give it.

STUB — the contract; implementation pending.

``calibrate_k_rule(metric, batches, k_max, random_state)`` is called by the selector
after a fit, on the training batches, and returns a JSON-safe dict stored with the
metric (``FittedMetric.k_rule``). ``choose_k(Z, rule, random_state)`` applies it to
records already mapped into the learned space.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from .metric import FittedMetric


def calibrate_k_rule(
    metric: FittedMetric,
    batches: Sequence[tuple[np.ndarray, np.ndarray]],
    k_max: int = 10,
    random_state: int | None = 0,
) -> dict[str, Any]:
    raise NotImplementedError


def choose_k(Z: np.ndarray, rule: dict[str, Any] | None, random_state: int | None = 0) -> int:
    raise NotImplementedError
