"""Use cases: what the HTTP layer and the RQ jobs do, one function per action.

Every function takes the :class:`service.context.Context` first, returns JSON-safe
data and raises :class:`service.errors.ServiceError` subclasses.
"""

from __future__ import annotations

from . import batches, fits, groupings, metrics, queues, versions

__all__ = ["batches", "fits", "groupings", "metrics", "queues", "versions"]
