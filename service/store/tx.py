"""Optimistic transactions: WATCH the keys a decision reads, then MULTI/EXEC the writes."""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import redis as redis_lib

from .errors import Contended

if TYPE_CHECKING:
    from redis.client import Pipeline

RETRIES = 20


def transact(redis: redis_lib.Redis, keys: list[str], body: Callable[[Pipeline], Any]) -> Any:
    """Run ``body(pipe)`` (reads, then ``pipe.multi()`` and writes) until EXEC succeeds.

    ``body`` may raise to abandon the transaction (nothing is written).
    """
    for _ in range(RETRIES):
        try:
            with redis.pipeline(transaction=True) as pipe:
                pipe.watch(*keys)
                result = body(pipe)
                pipe.execute()
                return result
        except redis_lib.WatchError:
            continue
    raise Contended("too many concurrent changes; try again")
