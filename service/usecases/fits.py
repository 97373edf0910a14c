"""Fits: queued on RQ, executed by workers; each success yields an immutable version.

A fit record lives in storage (``P:fit:{id}``); the RQ job only carries the fit id.
Reads reconcile the record with the RQ job, so a fit whose worker died is shown as
queued again (RQ retries it) or failed — never "running" forever.
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

from service.core import METHODS as LEARNERS
from service.errors import Conflict, InvalidInput, NotFound
from service.storage import utcnow

from .fit_exec import PUBLIC_FIELDS, execute_fit, reconcile
from .metrics import NAME_RE, require_metric

if TYPE_CHECKING:
    from redis.client import Pipeline

    from service.context import Context

JOB_FUNC = "workers.jobs.run_fit"
FAILURE_CALLBACK = "workers.jobs.on_fit_failure"
STATUSES = ("queued", "running", "succeeded", "failed")
METHODS = ("auto", *LEARNERS)  # a new learner registered in the core is offered here
ACTIVATE = ("if_better", "always", "never")
DEFAULTS: dict[str, Any] = {
    "method": "auto", "activate": "if_better", "alphas": None, "n_folds": 5,
    "max_rank": None, "k_max": 10, "seed": 0,
}
MAX_ALPHAS = 32
# the whole-number parameters: (lowest, highest, may be null)
INT_RANGES: dict[str, tuple[int, int, bool]] = {
    "n_folds": (2, 20, False), "max_rank": (1, 10_000, True),
    "k_max": (2, 50, False), "seed": (0, 2**32 - 1, True),
}
FIT_ID_RE = re.compile(r"[0-9a-f]{20}")


def _int(params: dict[str, Any], key: str, lo: int, hi: int, optional: bool = False) -> None:
    v = params[key]
    if v is None and optional:
        return
    if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
        raise InvalidInput.field(key, f"a whole number from {lo} to {hi}"
                                 + (" or null" if optional else ""))


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
        raise InvalidInput.field("activate", "one of " + ", ".join(ACTIVATE))
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


def _job_id(ctx: Context, fit_id: str, run: int) -> str:
    slug = re.sub(r"[^A-Za-z0-9_-]", "_", ctx.settings.key_prefix)
    return f"{slug}-fit-{fit_id}-{run}"


def _enqueuer(ctx: Context, fit_id: str, job_id: str) -> Callable[[Pipeline], None]:
    from rq import Callback, Retry

    s = ctx.settings

    def enqueue(pipe: Pipeline) -> None:
        ctx.queue.enqueue_call(
            JOB_FUNC, args=(fit_id,), job_id=job_id, timeout=s.fit_timeout,
            result_ttl=7 * 86400, failure_ttl=30 * 86400,
            retry=Retry(max=s.fit_retries) if s.fit_retries > 0 else None,
            on_failure=Callback(FAILURE_CALLBACK),
            meta={"key_prefix": s.key_prefix, "fit_id": fit_id, "stage": "queued",
                  "progress": 0.0},
            description=f"likewise fit {fit_id}", pipeline=pipe)

    return enqueue


def _public(record: dict[str, Any]) -> dict[str, Any]:
    return {k: record.get(k) for k in PUBLIC_FIELDS}


def request_fit(
    ctx: Context, name: str, params: dict[str, Any], requested_by: str
) -> tuple[dict[str, Any], bool]:
    """Queue a fit (True) or return the identical fit already queued or running (False)."""
    metric = require_metric(ctx, name)
    p = normalize_params(params)
    n_batches = ctx.storage.counts(name)["batches"]
    if n_batches < 2:
        raise Conflict(f"metric {name!r} has {n_batches} batch(es); a fit needs at least 2 "
                       "(cross-validation holds batches out)")
    digest = hashlib.sha256(json.dumps(p, sort_keys=True).encode()).hexdigest()[:32]
    dkey = ctx.storage.dedupe_key(name, digest)
    current = ctx.storage.dedupe_fit_id(dkey)
    if current is not None:  # let a dead fit release the dedupe slot first
        existing = ctx.storage.get_fit(current)
        if existing is not None:
            reconcile(ctx, existing)
    fit_id = secrets.token_hex(10)
    job_id = _job_id(ctx, fit_id, 0)
    now = time.time()
    record = {
        "fit_id": fit_id, "metric": name, "metric_uid": metric["uid"], "status": "queued",
        "progress": 0.0, "stage": "queued", "params": p, "version": None, "error": None,
        "decision": None, "created_at": utcnow(), "created_ts": now, "started_at": None,
        "ended_at": None, "requested_by": requested_by, "attempts": 0, "job_id": job_id,
        "runs": 0, "dedupe_key": dkey,
    }
    got, created = ctx.storage.create_fit(name, metric["uid"], record,
                                          _enqueuer(ctx, fit_id, job_id))
    return get_fit(ctx, got), created


def _load(ctx: Context, fit_id: str) -> dict[str, Any]:
    if not isinstance(fit_id, str) or not FIT_ID_RE.fullmatch(fit_id):
        raise NotFound(f"fit {fit_id!r} does not exist")
    record = ctx.storage.get_fit(fit_id)
    if record is None:
        raise NotFound(f"fit {fit_id!r} does not exist")
    return reconcile(ctx, record)


def get_fit(ctx: Context, fit_id: str) -> dict[str, Any]:
    return _public(_load(ctx, fit_id))


def list_fits(
    ctx: Context, metric: str | None = None, status: str | None = None
) -> dict[str, Any]:
    if status is not None and status not in STATUSES:
        raise InvalidInput.field("status", "one of " + ", ".join(STATUSES))
    if metric is not None:
        if not isinstance(metric, str) or not NAME_RE.fullmatch(metric):
            raise InvalidInput.field("metric", "a metric name: 1 to 64 lowercase letters, "
                                     "digits, '-' or '_'", f"invalid metric name {metric!r}")
        require_metric(ctx, metric)
    out = []
    for record in ctx.storage.get_fits(ctx.storage.fit_ids(metric)[::-1]):
        if record is None:
            continue
        record = reconcile(ctx, record)
        if status is None or record["status"] == status:
            out.append(_public(record))
    return {"fits": out}


def retry_fit(ctx: Context, fit_id: str, requested_by: str) -> dict[str, Any]:
    """Queue a failed fit again (same id, same parameters); 409 unless it failed."""
    record = _load(ctx, fit_id)
    if record["status"] != "failed":
        raise Conflict(f"fit {fit_id} is {record['status']}; only a failed fit can be retried")
    name = record["metric"]
    if ctx.storage.counts(name)["batches"] < 2:
        raise Conflict(f"metric {name!r} has fewer than 2 batches; add batches first")
    runs = int(record.get("runs") or 0) + 1
    job_id = _job_id(ctx, fit_id, runs)
    fields = {"status": "queued", "progress": 0.0, "stage": "queued", "error": None,
              "decision": None, "ended_at": None, "job_id": job_id, "runs": runs,
              "retried_by": requested_by}
    if not ctx.storage.requeue_fit(fit_id, fields, _enqueuer(ctx, fit_id, job_id)):
        raise Conflict(f"fit {fit_id} changed state; only a failed fit can be retried")
    return get_fit(ctx, fit_id)


__all__ = ["execute_fit", "get_fit", "list_fits", "normalize_params", "reconcile",
           "request_fit", "retry_fit"]
