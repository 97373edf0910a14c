"""The fit queue and its workers, for operators (``GET /v1/queues``) and ``/readyz``."""

from __future__ import annotations

from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

from service.clock import iso_utc
from service.store import UNAVAILABLE

if TYPE_CHECKING:
    from service.context import Context


def queue_overview(ctx: Context) -> dict[str, Any]:
    workers = [{
        "name": w.name,
        "state": w.state.value,
        "last_heartbeat": iso_utc(w.last_heartbeat) if w.last_heartbeat else None,
        "queues": w.queues,
        "current_fit": w.current_fit,
    } for w in ctx.jobs.workers()]
    return {"queues": [ctx.jobs.queue_counts()], "workers": workers}


def readiness(ctx: Context) -> tuple[bool, dict[str, Any]]:
    """Ready when Redis answers and a worker on our queue sent a heartbeat recently."""
    redis_ok = ctx.storage.answers()
    if not redis_ok:
        return False, {"redis": False, "workers_seen": 0}
    now = datetime.now(timezone.utc)
    try:
        seen = sum(1 for w in ctx.jobs.workers() if w.last_heartbeat is not None and (
            now - w.last_heartbeat).total_seconds() <= ctx.settings.worker_seen_seconds)
    except UNAVAILABLE:
        return False, {"redis": False, "workers_seen": 0}
    return redis_ok and seen > 0, {"redis": redis_ok, "workers_seen": seen}
