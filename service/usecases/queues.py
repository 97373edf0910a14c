"""The fit queue and its workers, for operators (``GET /v1/queues``) and ``/readyz``."""

from __future__ import annotations

from collections.abc import Callable
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

from service.clock import iso_utc
from service.store import UNAVAILABLE

if TYPE_CHECKING:
    from service.context import Context


def queue_overview(ctx: Context, visible: Callable[[str], bool] | None = None
                   ) -> dict[str, Any]:
    """Counts are deployment-wide (the queue is shared); a worker's current fit and its
    metric are shown only where ``visible(metric)`` allows (None: every metric)."""
    views = ctx.jobs.workers()
    current = [w.current_fit for w in views if w.current_fit]
    fits = dict(zip(current, ctx.storage.fits.get_many(current), strict=True)) if current else {}
    workers = []
    for w in views:
        fit = fits.get(w.current_fit) if w.current_fit else None
        metric = fit.metric if fit is not None else None
        shown = metric is not None and (visible is None or visible(metric))
        workers.append({
            "name": w.name,
            "state": w.state.value,
            "last_heartbeat": iso_utc(w.last_heartbeat) if w.last_heartbeat else None,
            "queues": w.queues,
            "current_fit": w.current_fit if shown else None,
            "current_metric": metric if shown else None,
        })
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
