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

    def unit_weights(self) -> tuple[np.ndarray, np.ndarray]:
        """``(weight, share)`` per feature (docs/method.md, "Reading a version").

        ``weight_j = ‖L[:, j]‖ / s_j``: the learned distance one unit of feature j adds
        by itself, in the feature's own units (a step ``δ`` along feature j alone moves
        ``z`` by ``δ · L[:, j] / s_j``). ``share_j = M_jj / tr(M)``: the fraction of the
        metric's trace on feature j, on standardised features (unit-free; sums to 1).
        """
        col = np.linalg.norm(self.components, axis=0)
        weight = col / self.scales
        sq = col**2  # M_jj
        total = float(sq.sum())
        share = sq / total if total > 0 else np.zeros_like(sq)
        return weight, share

    def directions(self, top: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        """``(strength, loadings)``: eigenvalues of ``M`` (largest first, the zero ones
        left out) and the unit eigenvectors as rows (loadings on standardised
        features), each signed so that its largest loading is positive."""
        vals, vecs = np.linalg.eigh(self.matrix)
        order = np.argsort(vals)[::-1]
        vals, vecs = vals[order], vecs[:, order].T
        keep = vals > max(float(vals[0]) if vals.size else 0.0, 0.0) * 1e-10
        vals, vecs = vals[keep], vecs[keep]
        if top is not None:
            vals, vecs = vals[:top], vecs[:top]
        big = np.abs(vecs).argmax(axis=1) if vecs.size else np.zeros(0, dtype=int)
        signs = np.sign(vecs[np.arange(len(vecs)), big])
        return vals, vecs * np.where(signs == 0, 1.0, signs)[:, None]

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
