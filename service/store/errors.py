"""What persistence can refuse, in its own terms; the use cases and the API map them."""

from __future__ import annotations

import redis

# what a call that could not reach the data store raises (the client library's error,
# or the socket's): callers that must outlive an outage catch these
UNAVAILABLE: tuple[type[BaseException], ...] = (redis.RedisError, OSError)


class StoreError(Exception):
    """Base class; ``str(exc)`` is a sentence for a person."""


class MissingMetric(StoreError):
    """The metric does not exist (or was deleted / re-created meanwhile)."""


class MissingVersion(StoreError):
    """The metric has no such version."""


class FeaturesLocked(StoreError):
    """The features of a metric that has batches cannot change."""


class Contended(StoreError):
    """Too many concurrent changes of the same keys; the caller may try again."""


class ActiveChanged(StoreError):
    """The active version changed between a decision and its commit."""


class DuplicateBatch(StoreError):
    """A batch with the same content is already stored on the metric."""

    def __init__(self, batch_id: str) -> None:
        super().__init__(f"a batch with the same content is stored as {batch_id}")
        self.batch_id = batch_id


class StaleAttempt(StoreError):
    """The fit is no longer run by this attempt (the warden handed it to another)."""
