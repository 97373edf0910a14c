"""Sufficient statistics of labelled batches.

Each batch is reduced, at ingest, to ``(n, k, G, H, sums)`` in raw feature units:

* ``G = X̃ᵀ X̃`` with ``X̃`` the batch centred on its own mean (total scatter);
* ``H = Σ_c n_c (m_c − m)(m_c − m)ᵀ`` (between-group scatter, same centring);
* ``sums`` the feature sums (for the pooled mean).

Statistics add and subtract, so a fit over many batches costs O(d³) however many
records were posted, and a fold of cross-validation is ``total − held_out``.
"""

from __future__ import annotations

import struct
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from .errors import CoreError
from .validation import check_groups, check_matrix

_MAGIC = b"LWS1"
# a removal that leaves less than this share of a feature's spread is redone by summing
# (it would keep only ~10 of 16 digits); our choice, no source
_CANCEL_TOL = 1e-6
_HEADER = struct.Struct("<4sIqqq")  # magic, d, n_batches, n, n_groups


@dataclass(frozen=True, eq=False)
class BatchStats:
    """Summed statistics of one or more labelled batches (raw units)."""

    n_batches: int
    n: int
    n_groups: int
    G: np.ndarray
    H: np.ndarray
    sums: np.ndarray

    @property
    def n_features(self) -> int:
        return int(self.sums.shape[0])

    @property
    def mean(self) -> np.ndarray:
        return self.sums / max(self.n, 1)

    @classmethod
    def zeros(cls, n_features: int) -> BatchStats:
        d = int(n_features)
        return cls(0, 0, 0, np.zeros((d, d)), np.zeros((d, d)), np.zeros(d))

    @classmethod
    def from_batch(cls, X, groups) -> BatchStats:
        """Statistics of one labelled batch; validates the batch first."""
        # NaN or infinity anywhere makes its column's diagonal of XᵀX non-finite, so
        # the scan of every value waits for the product (saves one pass over X)
        X = check_matrix(X, "records", finite=False)
        with np.errstate(invalid="ignore", over="ignore"):  # non-finite: handled below
            gram = X.T @ X
        overflow = not np.isfinite(np.diag(gram)).all()
        if overflow:
            check_matrix(X)  # names the first NaN or infinity; huge finite values pass
        codes = check_groups(X, groups)
        n, d = X.shape
        k = int(codes.max()) + 1
        counts = np.bincount(codes, minlength=k).astype(float)
        # group sums with one sparse indicator product (np.add.at is several times slower)
        # (k × n, column j holds record j's group: the indicator's transpose, built as is)
        member_t = sparse.csc_array((np.ones(n), codes, np.arange(n + 1)), shape=(k, n))
        raw_group_sums = np.asarray(member_t @ X)
        sums = raw_group_sums.sum(axis=0)
        mean = sums / n
        with np.errstate(invalid="ignore", over="ignore"):
            G = gram - n * np.outer(mean, mean)
        # Σ_c n_c m_c m_cᵀ with m_c the centred group means = Σ_c s_c s_cᵀ / n_c
        group_sums = raw_group_sums - counts[:, None] * mean
        # the same guard as removing a batch: below _CANCEL_TOL of the uncentred spread,
        # the shortcut would keep only ~10 of 16 digits
        if overflow or np.any(np.diag(G) < _CANCEL_TOL * np.diag(gram)):
            # large offsets cancel in the shortcut (or overflow it): centre first (one
            # more pass), for the group sums too (they cancel the same way). Shift by
            # the first record before taking the mean, so a constant feature centres to
            # exact zeros. Spread itself too large for float64 stays non-finite: the
            # caller checks.
            shifted = X - X[0]
            centred = shifted - shifted.mean(axis=0)
            G = centred.T @ centred
            group_sums = np.asarray(member_t @ centred)
        H = (group_sums / counts[:, None]).T @ group_sums
        G = (G + G.T) / 2.0
        H = (H + H.T) / 2.0
        return cls(1, int(n), k, G, H, sums)

    @classmethod
    def sum(cls, parts, n_features: int | None = None) -> BatchStats:
        parts = list(parts)
        if not parts:
            if n_features is None:
                raise CoreError("no batches to sum", field="batches")
            return cls.zeros(n_features)
        first = parts[0]
        if len(parts) == 1:
            return first
        # accumulated in place, in the order given: the same sums as ``a + b + …``,
        # without a new object and three new arrays per part
        G, H, sums = first.G.copy(), first.H.copy(), first.sums.copy()
        for p in parts[1:]:
            first._check_compatible(p)
            G += p.G
            H += p.H
            sums += p.sums
        return cls(sum(p.n_batches for p in parts), sum(p.n for p in parts),
                   sum(p.n_groups for p in parts), G, H, sums)

    def _check_compatible(self, other: BatchStats) -> None:
        if not isinstance(other, BatchStats):
            raise TypeError("can only combine BatchStats with BatchStats")
        if other.n_features != self.n_features:
            raise CoreError(
                f"feature counts differ ({self.n_features} vs {other.n_features})",
                field="features",
            )

    def __add__(self, other: BatchStats) -> BatchStats:
        self._check_compatible(other)
        return BatchStats(
            self.n_batches + other.n_batches,
            self.n + other.n,
            self.n_groups + other.n_groups,
            self.G + other.G,
            self.H + other.H,
            self.sums + other.sums,
        )

    def __sub__(self, other: BatchStats) -> BatchStats:
        self._check_compatible(other)
        if other.n_batches > self.n_batches or other.n > self.n:
            raise CoreError("cannot remove more batches than were added", field="batches")
        return BatchStats(
            self.n_batches - other.n_batches,
            self.n - other.n,
            self.n_groups - other.n_groups,
            self.G - other.G,
            self.H - other.H,
            self.sums - other.sums,
        )

    def allclose(self, other: BatchStats, rtol: float = 1e-9, atol: float = 1e-9) -> bool:
        return (
            self.n_batches == other.n_batches
            and self.n == other.n
            and self.n_groups == other.n_groups
            and np.allclose(self.G, other.G, rtol=rtol, atol=atol)
            and np.allclose(self.H, other.H, rtol=rtol, atol=atol)
            and np.allclose(self.sums, other.sums, rtol=rtol, atol=atol)
        )

    def to_bytes(self) -> bytes:
        """A small header and raw little-endian float64 (no pickle)."""
        d = self.n_features
        header = _HEADER.pack(_MAGIC, d, self.n_batches, self.n, self.n_groups)
        body = np.concatenate([self.G.ravel(), self.H.ravel(), self.sums]).astype("<f8")
        return header + body.tobytes()

    @classmethod
    def from_bytes(cls, data: bytes) -> BatchStats:
        if len(data) < _HEADER.size:
            raise CoreError("statistics blob is truncated", field="stats")
        magic, d, n_batches, n, n_groups = _HEADER.unpack_from(data)
        if magic != _MAGIC:
            raise CoreError("not a statistics blob", field="stats")
        body = np.frombuffer(data, dtype="<f8", offset=_HEADER.size)
        if body.size != 2 * d * d + d:
            raise CoreError("statistics blob has the wrong length", field="stats")
        body = body.astype(float)  # own, writable copy
        G = body[: d * d].reshape(d, d)
        H = body[d * d : 2 * d * d].reshape(d, d)
        sums = body[2 * d * d :]
        return cls(int(n_batches), int(n), int(n_groups), G, H, sums)


def without(
    total: BatchStats, removed: BatchStats, kept: Callable[[], BatchStats]
) -> BatchStats:
    """``total − removed``; ``kept()`` (the sum of the other batches) when that cancels.

    The subtraction is O(d²), but a feature whose spread in the remaining batches is
    tiny beside its spread in the removed ones keeps only rounding noise (relative
    error ≈ ε · G_removed / G_rest), which standardisation would blow up to unit
    variance. Then the remaining batches are summed afresh (O(b·d²), no cancellation).
    """
    rest = total - removed
    if np.any(np.diag(rest.G) < _CANCEL_TOL * np.diag(removed.G)):
        return kept()
    return rest
