"""Persistence: one store per concept behind :class:`Storage`, every key in ``keys.py``.

- ``keys.py`` — the key layout (the only module that spells key names);
- ``codecs.py`` — how matrices, labels and fields are encoded;
- ``metrics.py``, ``batches.py``, ``versions.py``, ``fits.py`` — one store per concept;
- ``idempotency.py`` — stored answers to retried requests;
- ``tallies.py`` — deployment-wide counters for ``/metrics`` (fits ended, activations);
- ``drift.py`` — hourly drift summaries of grouped records (never the records);
- ``runs.py`` — grouping runs: their chunked records and result chunks;
- ``leases.py`` — the lease a running fit or grouping run holds (both stores use it);
- ``errors.py`` — what persistence refuses, in its own terms (``StoreError``).

Writes that belong together run in one MULTI/EXEC (or one Lua script); read-check-write
sequences WATCH the keys they depend on and retry on a concurrent change.

Raw batches are kept for held-out scoring, compressed. Size cap: a batch may have at
most ``Settings.max_batch_records`` rows and its raw float64 matrix at most
``Settings.max_batch_bytes``; the use case refuses more before anything is written.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from .batches import BatchStore
from .drift import DriftStore
from .errors import (
    UNAVAILABLE,
    ActiveChanged,
    Contended,
    DuplicateBatch,
    FeaturesLocked,
    MissingMetric,
    MissingVersion,
    StaleAttempt,
    StoreError,
)
from .fits import FitStore
from .idempotency import IdempotencyStore
from .keys import Keys
from .metrics import MetricStore
from .runs import RunStore
from .tallies import TallyStore
from .versions import VersionStore

if TYPE_CHECKING:
    import redis


class Storage:
    """The stores of one deployment (``prefix``) on one Redis connection."""

    def __init__(self, redis: redis.Redis, prefix: str) -> None:
        self.redis = redis
        self.prefix = prefix
        self.keys = Keys(prefix)
        self.metrics = MetricStore(redis, self.keys)
        self.batches = BatchStore(redis, self.keys)
        self.tallies = TallyStore(redis, self.keys)
        self.fits = FitStore(redis, self.keys, self.tallies)
        self.versions = VersionStore(redis, self.keys, self.fits)
        self.idempotency = IdempotencyStore(redis, self.keys)
        self.drift = DriftStore(redis, self.keys)
        self.runs = RunStore(redis, self.keys)

    def answers(self) -> bool:
        """Whether the data store answers a ping now."""
        try:
            return bool(self.redis.ping())
        except UNAVAILABLE:
            return False

    def key(self, *parts: object) -> str:
        """A key under this deployment's prefix (for keys outside the layout, e.g. tests)."""
        return self.keys.join(*parts)


__all__ = ["ActiveChanged", "Contended", "DuplicateBatch", "FeaturesLocked", "Keys",
           "MissingMetric", "MissingVersion", "StaleAttempt", "Storage", "StoreError",
           "UNAVAILABLE"]
