"""Grouping runs: a large table grouped by a worker, its results read back by pages.

``start_run`` checks everything a grouping checks (features, finite values, k, the
version, which it pins: an activation during the run changes nothing), then stores
the validated matrix in chunks of :data:`CHUNK_ROWS` records with the run record and
its queue job in one transaction (:class:`~service.store.runs.RunStore`) before it
answers. A worker (``execute_run``) groups all records at once with the core's
``group_records`` — k-means is fitted on every record, exactly as a grouping of the
same table — feeds the drift watch once, and writes result chunks; the input chunks
are deleted when the run ends and everything else expires
``Settings.run_result_hours`` later. ``check_run`` is the warden's rule for runs: a
run whose worker died (its lease lapsed) gets a new job while attempts are left
(``Settings.fit_retries``), as fits do; so does one whose job failed unexpectedly
(``job_failed``, the queue's failure callback).
"""

from __future__ import annotations

import re
import secrets
import time
from datetime import datetime, timedelta, timezone
from typing import TYPE_CHECKING, Any

import numpy as np

from service.clock import utcnow
from service.core import CoreError, group_records
from service.core.clustering import overflowing_row
from service.errors import Conflict, InvalidInput, NotFound, ServiceError
from service.jobqueue import JobState
from service.run_lifecycle import Run, RunStatus
from service.store.codecs import pack_json, pack_matrix, unpack_json, unpack_matrix
from service.tables import Table

from . import drift, pages
from .backlog import BACKLOG
from .fit_exec import Lease
from .groupings import json_margins, load_version_metric, overflow_error, prepare
from .params import GroupCount, VersionNumber, metric_name

if TYPE_CHECKING:
    from service.context import Context

CHUNK_ROWS = 65_536
DEFAULT_RESULTS = 10_000
MAX_RESULTS = CHUNK_ROWS
RUN_ID_RE = re.compile(r"[0-9a-f]{20}")
STATUSES = tuple(s.value for s in RunStatus)


def _keep(ctx: Context) -> tuple[str, int]:
    """When a run that ends now expires (ISO time) and in how many seconds."""
    seconds = ctx.settings.run_result_hours * 3600
    at = datetime.now(timezone.utc) + timedelta(seconds=seconds)
    return at.isoformat().replace("+00:00", "Z"), seconds


# ---- requests ------------------------------------------------------------------------
def start_run(ctx: Context, name: str, table: Table, k: GroupCount | None = None,
              version: VersionNumber | None = None, *, ignore_extra: bool | None = None,
              id_column: str | None = None, requested_by: str = "") -> dict[str, Any]:
    """Validate a large grouping and store it for a worker; nothing is stored when
    any check fails."""
    p = prepare(ctx, name, table, k, version, ignore_extra=ignore_extra, id_column=id_column)
    X = p.matrix.X
    n = X.shape[0]
    if p.k is not None and p.k > n:
        raise InvalidInput.field("k", f"at most {n}, the number of records")
    size = CHUNK_ROWS
    chunks = []
    for i in range(0, n, size):  # one chunk mapped at a time: memory stays bounded
        with np.errstate(over="ignore", invalid="ignore"):
            row = overflowing_row(p.fitted.transform(X[i:i + size]))
        if row is not None:
            raise overflow_error(table, i + row)
        chunks.append(pack_matrix(X[i:i + size]))
    id_chunks = None if p.ids is None else [
        pack_json(p.ids[i:i + size]) for i in range(0, n, size)]
    run_id = secrets.token_hex(10)
    job_id = ctx.jobs.run_job_id_for(run_id, 0)
    imputed: dict[str, Any] = {"count": p.matrix.imputed}
    if p.matrix.imputed:
        imputed["by_feature"] = p.matrix.imputed_by_feature
    run = Run(run_id=run_id, metric=name, metric_uid=p.metric["uid"], version=p.version,
              k=p.k, n_records=n, n_chunks=len(chunks), chunk_rows=size, has_ids=p.ids is not None,
              requested_by=requested_by, job_id=job_id, created_at=utcnow(),
              created_ts=time.time(), imputed=imputed)
    ctx.storage.runs.create(run, chunks, id_chunks, ctx.jobs.run_enqueuer(run_id, job_id))
    return run.public()


def _load(ctx: Context, name: str, run_id: str) -> Run:
    metric_name(name)
    run = ctx.storage.runs.get(run_id) if RUN_ID_RE.fullmatch(run_id or "") else None
    if run is None or run.metric != name:
        raise NotFound(f"metric {name!r} has no grouping run {run_id!r} (results are kept "
                       f"{ctx.settings.run_result_hours} h after a run ends)")
    return run


def get_run(ctx: Context, name: str, run_id: str) -> dict[str, Any]:
    return _load(ctx, name, run_id).public()


def delete_run(ctx: Context, name: str, run_id: str) -> None:
    """Drop a run with its records and results (a worker grouping it writes nothing)."""
    ctx.storage.runs.delete(_load(ctx, name, run_id))


def result_columns(ctx: Context, name: str, run_id: str, limit: int = DEFAULT_RESULTS,
                   cursor: str | None = None) -> dict[str, Any]:
    """A page of a done run's results as arrays: ``start`` (the first record's
    position), ``labels``, ``distances``, ``margins`` (inf for a single group),
    ``ids`` (a list, or None), ``next_cursor``."""
    run = _load(ctx, name, run_id)
    kind = f"grouping-run:{run.run_id}"
    start = pages.decode(cursor, kind, lambda v: pages.whole(v) and v < run.n_records) or 0
    if run.status is not RunStatus.DONE:
        raise Conflict(f"grouping run {run_id} is {run.status}; its results are read "
                       "once it is done")
    end = min(run.n_records, start + limit)
    size = run.chunk_rows
    first, last = start // size, (end - 1) // size
    blobs = ctx.storage.runs.results(run, range(first, last + 1))
    if any(out is None or (run.has_ids and id_blob is None) for out, id_blob in blobs):
        raise NotFound(f"the results of grouping run {run_id} have expired")
    values = np.concatenate([unpack_matrix(out) for out, _ in blobs if out is not None])
    lo, hi = start - first * size, end - first * size
    values = values[lo:hi]
    ids = None
    if run.has_ids:
        ids = [v for _, blob in blobs if blob is not None for v in unpack_json(blob)][lo:hi]
    return {"start": start, "labels": values[:, 0].astype(np.int64),
            "distances": values[:, 1], "margins": values[:, 2], "ids": ids,
            "next_cursor": pages.encode(kind, end) if end < run.n_records else None}


def results_page(ctx: Context, name: str, run_id: str, limit: int = DEFAULT_RESULTS,
                 cursor: str | None = None) -> dict[str, Any]:
    """A page of results as JSON: concatenated in order, the pages are the answer a
    grouping of the same table gives (labels, distances, margins, ids)."""
    cols = result_columns(ctx, name, run_id, limit, cursor)
    page = {"run_id": run_id, "start": cols["start"], "labels": cols["labels"].tolist(),
            "distances": cols["distances"].tolist(), "margins": json_margins(cols["margins"])}
    if cols["ids"] is not None:
        page["ids"] = cols["ids"]
    page["next_cursor"] = cols["next_cursor"]
    return page


# ---- the worker's side ---------------------------------------------------------------
def _fail(ctx: Context, run_id: str, job_id: str, message: str) -> Run | None:
    at, seconds = _keep(ctx)
    return ctx.storage.runs.change(
        run_id, lambda r: r.fail(message, at) if r.live and r.job_id == job_id else None,
        keep_seconds=seconds)


def _begin(run: Run) -> Run:
    """The attempt starts; a record still grouping under this job id is an earlier
    start of the same job that died unnoticed."""
    if run.status is RunStatus.GROUPING:
        run = run.hand_over("the previous attempt stopped without a result", run.job_id)
    return run.begin()


def execute_run(ctx: Context, run_id: str, job_id: str) -> dict[str, Any]:
    """Group run ``run_id`` as the attempt of job ``job_id``; returns its state."""
    run = ctx.storage.runs.get(run_id)
    if run is None or not run.live or run.job_id != job_id:
        return {"run_id": run_id, "status": run.status.value if run else "gone"}
    with Lease(ctx, run_id, job_id, store=ctx.storage.runs):
        done = _attempt(ctx, run, job_id)
    run = done or ctx.storage.runs.get(run_id)
    return {"run_id": run_id, "status": run.status.value if run else "gone"}


def _attempt(ctx: Context, run: Run, job_id: str) -> Run | None:
    store, run_id = ctx.storage.runs, run.run_id
    metric = ctx.storage.metrics.get(run.metric)
    if metric is None or metric["uid"] != run.metric_uid:
        return _fail(ctx, run_id, job_id, f"metric {run.metric!r} was deleted")
    if store.change(run_id, lambda r: _begin(r) if r.live and r.job_id == job_id
                    else None) is None:
        return None
    try:
        fitted, _, _ = load_version_metric(ctx, metric, run.version)
    except ServiceError as exc:
        return _fail(ctx, run_id, job_id, exc.detail)
    parts = []
    for i, blob in enumerate(store.inputs(run)):
        if blob is None:
            return _fail(ctx, run_id, job_id, "the run's records are gone")
        parts.append(unpack_matrix(blob))
        store.set_progress(run_id, "loading", 0.1 * (i + 1) / run.n_chunks)
    X = np.concatenate(parts)
    del parts
    store.set_progress(run_id, "grouping", 0.1)
    try:
        g = group_records(fitted, X, k=run.k)
    except CoreError as exc:
        return _fail(ctx, run_id, job_id, f"{exc.field or 'records'}: {exc.message}")
    drift.record(ctx, metric, run.version, fitted, X, g, imputed=run.imputed.get("count", 0))
    store.set_progress(run_id, "writing", 0.9)
    values = np.column_stack([g.labels.astype(float), g.distances, g.margins])
    outputs = [pack_matrix(values[i:i + run.chunk_rows])
               for i in range(0, run.n_records, run.chunk_rows)]
    outcome = {"k": int(g.k), "k_chosen": bool(g.k_chosen),
               "sizes": g.sizes.astype(int).tolist(), "imputed": run.imputed.get("count", 0)}
    if run.imputed.get("by_feature"):
        outcome["imputed_by_feature"] = run.imputed["by_feature"]
    at, seconds = _keep(ctx)
    done = store.change(run_id, lambda r: r.finish(outcome, at)
                        if r.live and r.job_id == job_id else None,
                        keep_seconds=seconds, also=store.write_outputs(run_id, outputs))
    BACKLOG.flush()  # a work horse exits after its job: the drift summary lands first
    return done


def job_failed(ctx: Context, run_id: str, job_id: str, message: str) -> None:
    """The queue says the job of this attempt failed (an unexpected error, its time ran
    out, its work horse was killed): another job takes over while attempts are left
    (``Settings.fit_retries``, as for fits), else the run fails. A job that failed
    before its attempt began fails the run."""
    run = ctx.storage.runs.get(run_id)
    if run is None or not run.live or run.job_id != job_id:
        return
    if run.status is RunStatus.WAITING:
        _fail(ctx, run_id, job_id, message)
        return
    _retry_or_fail(ctx, run, message)


def _retry_or_fail(ctx: Context, run: Run, message: str) -> Run:
    """A grouping attempt ended without a result: a new job, or failed when its
    attempts are spent (fenced on what the caller saw)."""
    store = ctx.storage.runs
    seen = (run.status, run.job_id, run.attempts)

    def same(r: Run) -> bool:
        return (r.status, r.job_id, r.attempts) == seen

    if run.attempts > ctx.settings.fit_retries:
        at, seconds = _keep(ctx)
        changed = store.change(run.run_id, lambda r: r.fail(
            f"{message} ({r.attempts} attempts)", at) if same(r) else None,
            keep_seconds=seconds)
    else:
        job_id = ctx.jobs.run_job_id_for(run.run_id, run.runs + 1)
        changed = store.change(run.run_id, lambda r: r.hand_over(
            f"{message}; it waits for another attempt", job_id) if same(r) else None,
            enqueue=ctx.jobs.run_enqueuer(run.run_id, job_id))
    return changed or store.get(run.run_id) or run


# ---- the warden's side ---------------------------------------------------------------
def _job_move(run: Run, state: JobState, error: str | None, at: str) -> Run | None:
    if state is JobState.MISSING:
        return run.fail("the queue job of this run no longer exists", at)
    if state is JobState.FAILED:
        return run.fail(run.error or error or "the grouping job failed", at)
    if state is JobState.STOPPED:
        return run.fail("the grouping job was stopped", at)
    if state is JobState.DONE:
        return run.fail("the grouping job ended without recording a result", at)
    return None


def check_run(ctx: Context, run: Run) -> Run:
    """Bring one live run in line with its job (fenced on what the decision read)."""
    if not run.live:
        return run
    store = ctx.storage.runs
    seen = (run.status, run.job_id, run.attempts)

    def same(r: Run) -> bool:
        return (r.status, r.job_id, r.attempts) == seen

    at, seconds = _keep(ctx)
    if run.status is RunStatus.GROUPING and store.lease_holder(run.run_id) is None:
        changed = _retry_or_fail(ctx, run, "the worker grouping this run stopped")
        if changed != run:
            ctx.jobs.forget(run.job_id)
        return changed
    if run.status is RunStatus.WAITING and ctx.jobs.stranded(
            run.job_id, ctx.settings.stranded_seconds):
        job_id = ctx.jobs.run_job_id_for(run.run_id, run.runs + 1)
        reissued = store.change(run.run_id, lambda r: r.reissue(job_id) if same(r) else None,
                                enqueue=ctx.jobs.run_enqueuer(run.run_id, job_id))
        if reissued is not None:
            ctx.jobs.forget(run.job_id)
        return reissued or store.get(run.run_id) or run
    state, error = ctx.jobs.job_state(run.job_id)
    if state is JobState.FAILED and run.status is RunStatus.GROUPING:
        # the attempt began and its job failed without a word (its work horse was
        # killed: out of memory, its time ran out): another attempt, as for fits
        return _retry_or_fail(ctx, run, (error or "").strip("; ") or "the grouping job failed")
    if _job_move(run, state, error, at) is None:
        return run
    moved = store.change(run.run_id, lambda r: _job_move(r, state, error, at)
                         if same(r) else None, keep_seconds=seconds)
    return moved or store.get(run.run_id) or run


def sweep(ctx: Context) -> int:
    """One pass over every live run; returns how many changed."""
    changed = 0
    for run_id in ctx.storage.runs.live_ids():
        run = ctx.storage.runs.get(run_id)
        if run is None:
            ctx.storage.runs.forget_live(run_id)
        elif check_run(ctx, run) != run:
            changed += 1
    return changed
