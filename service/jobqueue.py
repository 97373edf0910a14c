"""The fit queue behind our own words: the only module of the service that speaks RQ.

A fit's job carries only the fit id; a grouping run's job (on the same queue, so
every worker serves both) only the run id. What the rest of the service needs from the
queue is here: enqueue a job inside a storage transaction, ask what became of a job
(:class:`JobState`, in the product's terms), let the queue notice attempts whose
worker stopped heartbeating (:func:`heal_stalled`), and show operators the queue and
its workers (:func:`queue_counts`, :func:`workers`, :class:`WorkerState`).
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime, timezone
from enum import Enum
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from redis.client import Pipeline

    from service.context import Context

JOB_FUNC = "workers.jobs.run_fit"
FAILURE_CALLBACK = "workers.jobs.on_fit_failure"
RESULT_TTL = 7 * 86400
FAILURE_TTL = 30 * 86400


class JobState(str, Enum):
    WAITING = "waiting"  # in the queue, or waiting for a retry
    RUNNING = "running"  # a worker holds it
    DONE = "done"  # the job returned
    FAILED = "failed"  # the job raised and has no retry left
    STOPPED = "stopped"  # stopped or cancelled by an operator
    MISSING = "missing"  # the queue no longer knows it


_STATES = {"queued": JobState.WAITING, "scheduled": JobState.WAITING,
           "deferred": JobState.WAITING, "started": JobState.RUNNING,
           "finished": JobState.DONE, "failed": JobState.FAILED,
           "stopped": JobState.STOPPED, "canceled": JobState.STOPPED}


def job_id_for(ctx: Context, fit_id: str, run: int) -> str:
    """The job id of run ``run`` of a fit (a retry by a person is a new run)."""
    slug = re.sub(r"[^A-Za-z0-9_-]", "_", ctx.settings.key_prefix)
    return f"{slug}-fit-{fit_id}-{run}"


def enqueuer(ctx: Context, fit_id: str, job_id: str) -> Callable[[Pipeline], None]:
    """A callback that enqueues the fit's job on a storage pipeline (same EXEC)."""
    from rq import Callback, Retry

    s = ctx.settings

    def enqueue(pipe: Pipeline) -> None:
        ctx.queue.enqueue_call(
            JOB_FUNC, args=(fit_id,), job_id=job_id, timeout=s.fit_timeout,
            result_ttl=RESULT_TTL, failure_ttl=FAILURE_TTL,
            retry=Retry(max=s.fit_retries) if s.fit_retries > 0 else None,
            on_failure=Callback(FAILURE_CALLBACK),
            meta={"key_prefix": s.key_prefix, "fit_id": fit_id},
            description=f"likewise fit {fit_id}", pipeline=pipe)

    return enqueue


RUN_FUNC = "workers.jobs.run_grouping"
RUN_FAILURE_CALLBACK = "workers.jobs.on_run_failure"


def run_job_id_for(ctx: Context, run_id: str, run: int) -> str:
    """The job id of run ``run`` of the queue for a grouping run (a new job after a
    worker died is a new one)."""
    slug = re.sub(r"[^A-Za-z0-9_-]", "_", ctx.settings.key_prefix)
    return f"{slug}-grun-{run_id}-{run}"


def run_enqueuer(ctx: Context, run_id: str, job_id: str) -> Callable[[Pipeline], None]:
    """A callback that enqueues a grouping run's job on a storage pipeline (same EXEC),
    on the fits' queue: every ``likewise worker`` serves both. No queue retry: the
    warden hands a run whose worker died to a new job."""
    from rq import Callback

    s = ctx.settings

    def enqueue(pipe: Pipeline) -> None:
        ctx.queue.enqueue_call(
            RUN_FUNC, args=(run_id,), job_id=job_id, timeout=s.fit_timeout,
            result_ttl=s.run_result_hours * 3600, failure_ttl=FAILURE_TTL,
            on_failure=Callback(RUN_FAILURE_CALLBACK),
            meta={"key_prefix": s.key_prefix, "run_id": run_id},
            description=f"likewise grouping run {run_id}", pipeline=pipe)

    return enqueue


def job_state(ctx: Context, job_id: str) -> tuple[JobState, str | None]:
    """What became of a job, and its last error line when it failed."""
    from rq.exceptions import NoSuchJobError
    from rq.job import Job

    try:
        job = Job.fetch(job_id, connection=ctx.redis)
    except NoSuchJobError:
        return JobState.MISSING, None
    status = job.get_status(refresh=False)
    state = _STATES.get(str(getattr(status, "value", status)), JobState.MISSING)
    if state is JobState.FAILED:
        return state, _last_error(job)
    return state, None


def stranded(ctx: Context, job_id: str, grace: float) -> bool:
    """Whether a job that a fit still waits on can no longer run by itself.

    Either a worker took it from the queue and died before the fit began (the queue
    says it started, more than ``grace`` seconds ago — a live worker begins a fit it
    took at once), or it left the queue's list without reaching a worker (a crash
    between the two moves; it waits, but no worker will ever see it).
    """
    from rq.exceptions import NoSuchJobError
    from rq.job import Job

    try:
        job = Job.fetch(job_id, connection=ctx.redis)
    except NoSuchJobError:
        return False  # the warden's other rule: a missing job fails its fit
    status = str(getattr(job.get_status(refresh=False), "value", job.get_status(refresh=False)))
    now = datetime.now(timezone.utc)
    if status == "started":
        since = job.started_at or job.enqueued_at
        return since is not None and (now - _aware(since)).total_seconds() > grace
    if status == "queued" and ctx.queue.get_job_position(job_id) is None:
        since = job.enqueued_at or job.created_at
        return since is not None and (now - _aware(since)).total_seconds() > grace
    return False


def _last_error(job: Any) -> str:
    try:
        result = job.latest_result()
        text = (result.exc_string if result is not None else None) or ""
    except Exception:  # noqa: BLE001 — best effort description only
        text = ""
    lines = [ln for ln in text.strip().splitlines() if ln.strip()]
    return lines[-1].strip() if lines else "the fit job failed"


def forget(ctx: Context, job_id: str) -> None:
    """Drop a job whose attempt was given up (the fit moved on to a new job)."""
    from rq.exceptions import NoSuchJobError
    from rq.job import Job

    try:
        Job.fetch(job_id, connection=ctx.redis).delete()
    except NoSuchJobError:
        pass


def heal_stalled(ctx: Context) -> None:
    """Let the queue hand back jobs whose worker stopped heartbeating: each one is
    retried if it has retries left, else failed (the failure callback records it)."""
    from rq.registry import StartedJobRegistry

    StartedJobRegistry(queue=ctx.queue).cleanup()


# ---- what operators see: the queue and its workers, in our words --------------------
class WorkerState(str, Enum):
    STARTING = "starting"
    READY = "ready"  # waiting for a fit
    FITTING = "fitting"
    GROUPING = "grouping"  # running a grouping run's job
    PAUSED = "paused"


_WORKER_STATES = {"starting": WorkerState.STARTING, "started": WorkerState.STARTING,
                  "idle": WorkerState.READY, "busy": WorkerState.FITTING,
                  "suspended": WorkerState.PAUSED}
_JOB_ID = re.compile(r".+-fit-([0-9a-f]{20})-\d+")
_RUN_JOB_ID = re.compile(r".+-grun-[0-9a-f]{20}-\d+")


def _aware(dt: datetime) -> datetime:
    """The queue's timestamps are naive UTC."""
    return dt.replace(tzinfo=timezone.utc) if dt.tzinfo is None else dt


def queue_counts(ctx: Context) -> dict[str, Any]:
    """Fits waiting, being fitted, failed and done on this deployment's queue, and how
    long the oldest waiting one has waited (seconds; None when none waits)."""
    from rq.job import Job

    q = ctx.queue
    oldest = None
    first = q.get_job_ids(0, 1)
    if first:
        job = Job.fetch(first[0], connection=ctx.redis)
        if job is not None and job.enqueued_at is not None:
            waited = datetime.now(timezone.utc) - _aware(job.enqueued_at)
            oldest = max(0.0, waited.total_seconds())
    return {"name": q.name, "waiting": q.count, "fitting": q.started_job_registry.count,
            "failed": q.failed_job_registry.count, "done": q.finished_job_registry.count,
            "oldest_waiting_seconds": oldest}


@dataclass(frozen=True)
class WorkerView:
    name: str
    state: WorkerState
    last_heartbeat: datetime | None
    queues: list[str]
    current_fit: str | None


def workers(ctx: Context) -> list[WorkerView]:
    """The workers registered on this deployment's queue, by name."""
    from rq import Worker

    out = []
    for w in Worker.all(queue=ctx.queue):
        raw = w.get_state()
        state = _WORKER_STATES.get(str(getattr(raw, "value", raw)), WorkerState.STARTING)
        job_id = w.get_current_job_id()
        match = _JOB_ID.fullmatch(job_id) if job_id else None
        if state is WorkerState.FITTING and job_id and _RUN_JOB_ID.fullmatch(job_id):
            state = WorkerState.GROUPING
        beat = _aware(w.last_heartbeat) if w.last_heartbeat is not None else None
        out.append(WorkerView(w.name, state, beat, w.queue_names(),
                              match.group(1) if match else None))
    return sorted(out, key=lambda v: v.name)


class RQFitQueue:
    """The fit queue as the use cases see it (``service.usecases.ports.FitQueue``):
    the functions above, bound to one context (``ctx.jobs``)."""

    def __init__(self, ctx: Context) -> None:
        self._ctx = ctx

    def job_id_for(self, fit_id: str, run: int) -> str:
        return job_id_for(self._ctx, fit_id, run)

    def enqueuer(self, fit_id: str, job_id: str) -> Callable[[Pipeline], None]:
        return enqueuer(self._ctx, fit_id, job_id)

    def run_job_id_for(self, run_id: str, run: int) -> str:
        return run_job_id_for(self._ctx, run_id, run)

    def run_enqueuer(self, run_id: str, job_id: str) -> Callable[[Pipeline], None]:
        return run_enqueuer(self._ctx, run_id, job_id)

    def job_state(self, job_id: str) -> tuple[JobState, str | None]:
        return job_state(self._ctx, job_id)

    def stranded(self, job_id: str, grace: float) -> bool:
        return stranded(self._ctx, job_id, grace)

    def forget(self, job_id: str) -> None:
        forget(self._ctx, job_id)

    def heal_stalled(self) -> None:
        heal_stalled(self._ctx)

    def queue_counts(self) -> dict[str, Any]:
        return queue_counts(self._ctx)

    def workers(self) -> list[WorkerView]:
        return workers(self._ctx)
