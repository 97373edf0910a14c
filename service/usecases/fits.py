"""Fits: requested, then run by workers; each success yields an immutable version.

A fit record lives in storage (``P:fit:{id}``, a :class:`~service.lifecycle.Fit`);
the queue job only carries the fit id. Reads never write: the warden
(:mod:`service.usecases.warden`) brings live fits in line with their jobs, so a fit
whose worker died waits again (retried) or fails — never "running" forever.
"""

from __future__ import annotations

import hashlib
import json
import re
import secrets
import time
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from service.clock import utcnow
from service.errors import Conflict, NotFound
from service.lifecycle import Fit, FitStatus

from . import pages, warden
from .fit_exec import execute_fit
from .metrics import require_metric
from .params import ACTIVATE, METHODS, FitParams, MetricName

if TYPE_CHECKING:
    from service.context import Context

STATUSES = tuple(s.value for s in FitStatus)
# the parameters' rules live in .params; these names stay importable from here
DEFAULTS: dict[str, Any] = FitParams().as_dict()
SCAN = 200  # fits read per round trip while a status filter skips some
FIT_ID_RE = re.compile(r"[0-9a-f]{20}")


def _enough_batches(ctx: Context, name: str) -> None:
    """409 unless the metric has 2 batches with records (cross-validation holds batches
    out, and only batches with records can be scored); statistics-only ones add to them."""
    kinds = [m.get("kind", "records") for m in ctx.storage.batches.metas(name)]
    raw = sum(k == "records" for k in kinds)
    if raw < 2:
        raise Conflict(f"metric {name!r} has {raw} batch(es) with records and "
                       f"{len(kinds) - raw} statistics-only; a fit needs at least 2 with "
                       "records (cross-validation holds them out)")


def request_fit(
    ctx: Context, name: str, params: FitParams, requested_by: str
) -> tuple[dict[str, Any], bool]:
    """Queue a fit (True) or return the identical fit already waiting or running (False)."""
    metric = require_metric(ctx, name)
    p = params.as_dict()  # canonical: identical parameters hash alike
    _enough_batches(ctx, name)
    digest = hashlib.sha256(json.dumps(p, sort_keys=True).encode()).hexdigest()[:32]
    dkey = ctx.storage.fits.dedupe_key(name, digest)
    holder = ctx.storage.fits.dedupe_holder(dkey)
    if holder is not None:  # this request writes anyway: let a dead fit free the slot
        warden.check_fit(ctx, holder)
    fit_id = secrets.token_hex(10)
    job_id = ctx.jobs.job_id_for(fit_id, 0)
    fit = Fit(fit_id=fit_id, metric=name, metric_uid=metric["uid"], params=p,
              requested_by=requested_by, job_id=job_id, dedupe_key=dkey,
              created_at=utcnow(), created_ts=time.time())
    got, created = ctx.storage.fits.create(fit, ctx.jobs.enqueuer(fit_id, job_id))
    return get_fit(ctx, got), created


def _load(ctx: Context, fit_id: str) -> Fit:
    if not isinstance(fit_id, str) or not FIT_ID_RE.fullmatch(fit_id):
        raise NotFound(f"fit {fit_id!r} does not exist")
    fit = ctx.storage.fits.get(fit_id)
    if fit is None:
        raise NotFound(f"fit {fit_id!r} does not exist")
    return fit


def get_fit(ctx: Context, fit_id: str) -> dict[str, Any]:
    return _load(ctx, fit_id).public()


def _fit_position(v: Any) -> bool:
    return (isinstance(v, list) and len(v) == 2 and isinstance(v[0], (int, float))
            and not isinstance(v[0], bool) and isinstance(v[1], str)
            and bool(FIT_ID_RE.fullmatch(v[1])))


def list_fits(
    ctx: Context, metric: MetricName | None = None, status: FitStatus | None = None,
    limit: int = pages.DEFAULT_LIMIT, cursor: str | None = None,
    visible: Callable[[str], bool] | None = None,
) -> dict[str, Any]:
    """A page of fits, newest first (by creation time, then id), of one metric or of
    every metric ``visible`` lets the caller see; ``status`` filters."""
    before = pages.decode(cursor, "fits", _fit_position)
    if metric is not None:
        require_metric(ctx, metric)
        names: list[str] = [metric]
    else:
        names = ctx.storage.metrics.names()
    names = [n for n in names if visible is None or visible(n)]
    position = (float(before[0]), before[1]) if before is not None else None
    chosen: list[Fit] = []
    scan = max(limit + 1, SCAN)
    while len(chosen) <= limit:  # a status filter may skip many: scan on in chunks
        found = ctx.storage.fits.ids_before(names, position, scan)
        for fit in ctx.storage.fits.get_many([f for _, f in found]):
            if fit is not None and (status is None or fit.status == status):
                chosen.append(fit)
        if len(found) < scan:
            break
        position = found[-1]
    return _fit_page(chosen, limit)


def _fit_page(chosen: list[Fit], limit: int) -> dict[str, Any]:
    shown = chosen[:limit]
    more = len(chosen) > limit
    return {"fits": [f.public() for f in shown],
            "next_cursor": pages.encode("fits", [shown[-1].created_ts, shown[-1].fit_id])
            if more else None}


def retry_fit(ctx: Context, fit_id: str, requested_by: str) -> dict[str, Any]:
    """Queue a failed fit again (same id, same parameters); 409 unless it failed."""
    fit = _load(ctx, fit_id)
    if fit.status is not FitStatus.FAILED:
        raise Conflict(f"fit {fit_id} is {fit.status}; only a failed fit can be retried")
    name = fit.metric
    _enough_batches(ctx, name)
    job_id = ctx.jobs.job_id_for(fit_id, fit.runs + 1)
    moved = ctx.storage.fits.change(
        fit_id, lambda f: f.requeue(job_id, requested_by)
        if f.status is FitStatus.FAILED and f.runs == fit.runs else None,
        enqueue=ctx.jobs.enqueuer(fit_id, job_id))
    if moved is None:
        raise Conflict(f"fit {fit_id} changed state; only a failed fit can be retried")
    return moved.public()


__all__ = ["ACTIVATE", "METHODS", "execute_fit", "get_fit", "list_fits", "request_fit",
           "retry_fit"]
