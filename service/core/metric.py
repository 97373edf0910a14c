"""A fitted metric: plain data that maps records into the learned space.

``z = L · ((x − mean) / scales)``; k-means on ``z`` is k-means under the
Mahalanobis metric ``M = Lᵀ L`` on standardised features.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .validation import check_matrix


@dataclass(frozen=True, eq=False)
class FittedMetric:
    """Everything needed to group new records; serialises to JSON-safe data."""

    method: str
    alpha: float
    scales: np.ndarray  # (d,) feature scales s_j
    mean: np.ndarray  # (d,) pooled mean of the posted records
    components: np.ndarray  # (r, d) the map L, on standardised features
    k_rule: dict[str, Any] | None = None  # calibrated rule for unknown k (JSON-safe)
    info: dict[str, Any] = field(default_factory=dict)  # warnings, eigenvalues … (JSON-safe)

    @property
    def n_features(self) -> int:
        return int(self.scales.shape[0])

    @property
    def rank(self) -> int:
        return int(self.components.shape[0])

    @property
    def matrix(self) -> np.ndarray:
        """``M = Lᵀ L`` on standardised features (d × d)."""
        return self.components.T @ self.components

    def transform(self, X) -> np.ndarray:
        """Map records (n × d, raw units) into the learned space (n × r)."""
        X = check_matrix(X, "records", self.n_features)
        return self.standardise(X) @ self.components.T

    def standardise(self, X: np.ndarray) -> np.ndarray:
        """``(X − mean) / scales`` of records already checked (the first step of
        :meth:`transform`, for callers that share it between maps)."""
        return (X - self.mean) / self.scales

    def with_k_rule(self, k_rule: dict[str, Any] | None) -> FittedMetric:
        return FittedMetric(
            self.method, self.alpha, self.scales, self.mean, self.components, k_rule, self.info
        )

    def to_dict(self) -> dict[str, Any]:
        return {
            "method": self.method,
            "alpha": float(self.alpha),
            "scales": self.scales.tolist(),
            "mean": self.mean.tolist(),
            "components": self.components.tolist(),
            "rank": self.rank,
            "k_rule": self.k_rule,
            "info": self.info,
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> FittedMetric:
        scales = np.asarray(data["scales"], dtype=float)
        comps = np.asarray(data["components"], dtype=float).reshape(-1, scales.shape[0])
        return cls(
            method=str(data["method"]),
            alpha=float(data["alpha"]),
            scales=scales,
            mean=np.asarray(data["mean"], dtype=float),
            components=comps,
            k_rule=data.get("k_rule"),
            info=dict(data.get("info") or {}),
        )
