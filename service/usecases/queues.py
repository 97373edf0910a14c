"""The fit queue and its workers, for operators (``GET /v1/queues``) and ``/readyz``."""

from __future__ import annotations

from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

import redis as redis_lib

from service.clock import iso_utc

if TYPE_CHECKING:
    from service.context import Context


def _aware(dt: datetime) -> datetime:
    """RQ's timestamps are naive UTC."""
    return dt.replace(tzinfo=timezone.utc) if dt.tzinfo is None else dt


def _iso(dt: datetime | None) -> str | None:
    return None if dt is None else iso_utc(_aware(dt))


def _workers(ctx: Context) -> list[Any]:
    from rq import Worker

    return list(Worker.all(queue=ctx.queue))


def queue_overview(ctx: Context) -> dict[str, Any]:
    from rq.job import Job

    q = ctx.queue
    oldest_age = None
    first = q.get_job_ids(0, 1)
    if first:
        job = Job.fetch(first[0], connection=ctx.redis)
        if job is not None and job.enqueued_at is not None:
            enq = _aware(job.enqueued_at)
            oldest_age = max(0.0, (datetime.now(timezone.utc) - enq).total_seconds())
    queues = [{
        "name": q.name,
        "queued": q.count,
        "running": q.started_job_registry.count,
        "failed": q.failed_job_registry.count,
        "finished": q.finished_job_registry.count,
        "oldest_queued_age_seconds": oldest_age,
    }]
    workers = [{
        "name": w.name,
        "state": str(w.get_state()),
        "last_heartbeat": _iso(w.last_heartbeat),
        "queues": w.queue_names(),
        "current_job": w.get_current_job_id(),
    } for w in sorted(_workers(ctx), key=lambda w: w.name)]
    return {"queues": queues, "workers": workers}


def readiness(ctx: Context) -> tuple[bool, dict[str, Any]]:
    """Ready when Redis answers and a worker on our queue sent a heartbeat recently."""
    try:
        redis_ok = bool(ctx.redis.ping())
    except (redis_lib.RedisError, OSError):
        return False, {"redis": False, "workers_seen": 0}
    now = datetime.now(timezone.utc)
    seen = 0
    try:
        for w in _workers(ctx):
            hb = w.last_heartbeat
            if hb is None:
                continue
            if (now - _aware(hb)).total_seconds() <= ctx.settings.worker_seen_seconds:
                seen += 1
    except redis_lib.RedisError:
        return False, {"redis": False, "workers_seen": 0}
    return redis_ok and seen > 0, {"redis": redis_ok, "workers_seen": seen}
