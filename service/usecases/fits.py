"""Fits: requested, then run by workers; each success yields an immutable version.

A fit record lives in storage (``P:fit:{id}``, a :class:`~service.lifecycle.Fit`);
the queue job only carries the fit id. Reads never write: the warden
(:mod:`service.usecases.warden`) brings live fits in line with their jobs, so a fit
whose worker died waits again (retried) or fails — never "running" forever.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
import secrets
import time
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from service import jobqueue
from service.clock import utcnow
from service.core import METHODS as LEARNERS
from service.errors import Conflict, InvalidInput, NotFound
from service.lifecycle import FORMER_ACTIVATE, Fit, FitStatus

from . import pages, warden
from .fit_exec import execute_fit
from .metrics import NAME_RE, require_metric

if TYPE_CHECKING:
    from service.context import Context

STATUSES = tuple(s.value for s in FitStatus)
METHODS = ("auto", *LEARNERS)  # a new learner registered in the core is offered here
# when_better: only if it scores at least the active version on the same folds;
# at_once: whatever its score; by_hand: stored, activated later by a person
ACTIVATE = ("when_better", "at_once", "by_hand")
# the names the options had before (FORMER_ACTIVATE) are refused with a 422 naming the
# new one, never aliased; stored fit records that carry them read under the new names
DEFAULTS: dict[str, Any] = {
    "method": "auto", "activate": "when_better", "alphas": None, "n_folds": 5,
    "max_rank": None, "k_max": 10, "seed": 0,
}
MAX_ALPHAS = 32
# the whole-number parameters: (lowest, highest, may be null)
INT_RANGES: dict[str, tuple[int, int, bool]] = {
    "n_folds": (2, 20, False), "max_rank": (1, 10_000, True),
    "k_max": (2, 50, False), "seed": (0, 2**32 - 1, True),
}
SCAN = 200  # fits read per round trip while a status filter skips some
FIT_ID_RE = re.compile(r"[0-9a-f]{20}")


def _int(params: dict[str, Any], key: str, lo: int, hi: int, optional: bool = False) -> None:
    v = params[key]
    if v is None and optional:
        return
    if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
        raise InvalidInput.field(key, f"a whole number from {lo} to {hi}"
                                 + (" or null" if optional else ""))


def activate_message(given: Any) -> str:
    """What to say about an activation policy that is not one of ours."""
    choices = "one of " + ", ".join(ACTIVATE)
    if isinstance(given, str) and given in FORMER_ACTIVATE:
        return f"{given!r} is now called {FORMER_ACTIVATE[given]!r}; {choices}"
    return choices


def normalize_params(params: dict[str, Any] | None) -> dict[str, Any]:
    """Fill defaults and validate; the result is canonical (used for dedupe)."""
    params = dict(params or {})
    unknown = sorted(set(params) - set(DEFAULTS))
    if unknown:
        raise InvalidInput(f"unknown fit parameter(s): {', '.join(unknown)}",
                           [{"field": u, "message": "unknown parameter"} for u in unknown])
    p = {**DEFAULTS, **{k: v for k, v in params.items() if v is not None}}
    if p["method"] not in METHODS:
        raise InvalidInput.field("method", "one of " + ", ".join(METHODS))
    if p["activate"] not in ACTIVATE:
        raise InvalidInput.field("activate", activate_message(p["activate"]))
    alphas = p["alphas"]
    if alphas is not None:
        if (not isinstance(alphas, list) or not 1 <= len(alphas) <= MAX_ALPHAS or any(
                isinstance(a, bool) or not isinstance(a, (int, float))
                or not math.isfinite(a) or a <= 0 for a in alphas)):
            raise InvalidInput.field("alphas", f"a list of 1 to {MAX_ALPHAS} positive numbers")
        p["alphas"] = sorted({float(a) for a in alphas})
    for key, (lo, hi, optional) in INT_RANGES.items():
        _int(p, key, lo, hi, optional)
    return p


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
    ctx: Context, name: str, params: dict[str, Any], requested_by: str
) -> tuple[dict[str, Any], bool]:
    """Queue a fit (True) or return the identical fit already waiting or running (False)."""
    metric = require_metric(ctx, name)
    p = normalize_params(params)
    _enough_batches(ctx, name)
    digest = hashlib.sha256(json.dumps(p, sort_keys=True).encode()).hexdigest()[:32]
    dkey = ctx.storage.fits.dedupe_key(name, digest)
    holder = ctx.storage.fits.dedupe_holder(dkey)
    if holder is not None:  # this request writes anyway: let a dead fit free the slot
        warden.check_fit(ctx, holder)
    fit_id = secrets.token_hex(10)
    job_id = jobqueue.job_id_for(ctx, fit_id, 0)
    fit = Fit(fit_id=fit_id, metric=name, metric_uid=metric["uid"], params=p,
              requested_by=requested_by, job_id=job_id, dedupe_key=dkey,
              created_at=utcnow(), created_ts=time.time())
    got, created = ctx.storage.fits.create(fit, jobqueue.enqueuer(ctx, fit_id, job_id))
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
    ctx: Context, metric: str | None = None, status: str | None = None,
    limit: int | None = None, cursor: str | None = None,
    visible: Callable[[str], bool] | None = None,
) -> dict[str, Any]:
    """A page of fits, newest first (by creation time, then id), of one metric or of
    every metric ``visible`` lets the caller see; ``status`` filters."""
    if status is not None and status not in STATUSES:
        raise InvalidInput.field("status", "one of " + ", ".join(STATUSES))
    limit = pages.check_limit(limit)
    before = pages.decode(cursor, "fits", _fit_position)
    if metric is not None:
        if not isinstance(metric, str) or not NAME_RE.fullmatch(metric):
            raise InvalidInput.field("metric", "a metric name: 1 to 64 lowercase letters, "
                                     "digits, '-' or '_'", f"invalid metric name {metric!r}")
        require_metric(ctx, metric)
        names = [metric]
    else:
        names = ctx.storage.metrics.names()
    names = [n for n in names if visible is None or visible(n)]
    position = (float(before[0]), before[1]) if before is not None else None
    chosen: list[Fit] = []
    scan = max(limit + 1, SCAN)
    while len(chosen) <= limit:  # a status filter may skip many: scan on in chunks
        found = ctx.storage.fits.ids_before(names, position, scan)
        for fit in ctx.storage.fits.get_many([f for _, f in found]):
            if fit is not None and (status is None or fit.status.value == status):
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
    job_id = jobqueue.job_id_for(ctx, fit_id, fit.runs + 1)
    moved = ctx.storage.fits.change(
        fit_id, lambda f: f.requeue(job_id, requested_by)
        if f.status is FitStatus.FAILED and f.runs == fit.runs else None,
        enqueue=jobqueue.enqueuer(ctx, fit_id, job_id))
    if moved is None:
        raise Conflict(f"fit {fit_id} changed state; only a failed fit can be retried")
    return moved.public()


__all__ = ["execute_fit", "get_fit", "list_fits", "normalize_params", "request_fit",
           "retry_fit"]
