"""The dependencies of one process: settings, Redis, storage, queue, version cache.

Entry points (the app factory, the worker, the launcher) call :meth:`Context.build`.
Nothing connects at import time; ``redis.Redis.from_url`` connects on first use.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from dataclasses import dataclass
from functools import cached_property
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import redis
    import rq

    from service.config import Settings
    from service.usecases.ports import FitQueue, Stores


class VersionCache:
    """A small thread-safe LRU of loaded versions keyed ``(metric, version, token)``.

    ``token`` distinguishes a metric deleted and re-created under the same name.
    """

    def __init__(self, maxsize: int = 64) -> None:
        self.maxsize = maxsize
        self._data: OrderedDict[tuple[Any, ...], Any] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: tuple[Any, ...]) -> Any | None:
        with self._lock:
            value = self._data.get(key)
            if value is not None:
                self._data.move_to_end(key)
            return value

    def put(self, key: tuple[Any, ...], value: Any) -> None:
        with self._lock:
            self._data[key] = value
            self._data.move_to_end(key)
            while len(self._data) > self.maxsize:
                self._data.popitem(last=False)

    def clear(self) -> None:
        with self._lock:
            self._data.clear()

    def __len__(self) -> int:
        return len(self._data)


@dataclass
class Context:
    """``storage`` and ``jobs`` are what the use cases use, typed by the protocols of
    ``service/usecases/ports.py``; ``redis`` and ``queue`` are for the entry points
    and the adapters (the web tier's outage checks, the RQ worker)."""

    settings: Settings
    redis: redis.Redis
    storage: Stores
    queue: rq.Queue
    cache: VersionCache

    @cached_property
    def jobs(self) -> FitQueue:
        """The fit queue in our words (``service.jobqueue.RQFitQueue`` on ``queue``)."""
        from service.jobqueue import RQFitQueue

        return RQFitQueue(self)

    @classmethod
    def build(cls, settings: Settings, connection: redis.Redis | None = None,
              answer_within: float | None = None) -> Context:
        """Wire the dependencies; requires ``settings.redis_url`` unless ``connection``.

        ``answer_within`` (seconds) bounds every Redis call — connecting, and waiting
        for a reply — with no retry: the web tier answers 503 in that time when Redis
        hangs or is gone, instead of holding a request. Workers leave it unset (the
        queue blocks on Redis by design).
        """
        import redis as redis_lib
        import rq
        from redis.backoff import NoBackoff
        from redis.retry import Retry

        from service.store import Storage

        if connection is None:
            if not settings.redis_url:
                raise ValueError("LIKEWISE_REDIS_URL is not set (no Redis to connect to)")
            bounded: dict[str, Any] = {}
            if answer_within is not None:
                bounded = {"socket_timeout": answer_within,
                           "socket_connect_timeout": answer_within,
                           "retry": Retry(NoBackoff(), 0)}
            connection = redis_lib.Redis.from_url(
                settings.redis_url, decode_responses=False, health_check_interval=30,
                **bounded)
        storage = Storage(connection, settings.key_prefix)
        queue = rq.Queue(
            settings.queue_name, connection=connection, default_timeout=settings.fit_timeout
        )
        return cls(settings, connection, storage, queue, VersionCache())

    def close(self) -> None:
        self.redis.close()
