"""RQ jobs: module-level functions taking ids only (no pickled arrays on the queue).

``run_fit(fit_id)`` runs :func:`service.usecases.fits.execute_fit` as the attempt
named by the job's id. Progress (stage and fraction) goes to the fit record. Invalid
data fails the fit without a retry; any other exception (including the job timeout)
propagates, and RQ retries the job while it has retries left. ``on_fit_failure`` —
RQ's failure callback, called on every failed attempt before RQ decides on a retry,
and also when RQ finds a job abandoned by a dead worker (SIGKILL, lost machine) —
records each failure in the fit record. ``run_grouping(run_id)`` groups a grouping
run (:func:`service.usecases.grouping_runs.execute_run`); ``on_run_failure`` hands
it to a new job, or fails it, when its job raised or its work horse died.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from redis import Redis
    from rq.job import Job

    from service.config import Settings
    from service.context import Context

# Set by workers.worker.run_worker in the worker process; else settings come from env.
worker_settings: Settings | None = None


def _context(job: Job, connection: Redis | None = None) -> Context:
    from service.config import Settings
    from service.context import Context

    base = worker_settings or Settings.from_env()
    prefix = job.meta.get("key_prefix", base.key_prefix)
    if prefix != base.key_prefix or job.origin != base.queue_name:
        base = base.replace(key_prefix=prefix, queue_name=job.origin)
    return Context.build(base, connection=connection or job.connection)


def run_fit(fit_id: str) -> dict[str, Any]:
    """Execute fit ``fit_id`` (the RQ entry point); returns its JSON-safe result."""
    from rq import get_current_job

    from service.usecases.fits import execute_fit

    job = get_current_job()
    if job is None:
        raise RuntimeError("run_fit must run inside an RQ job")
    return execute_fit(_context(job), fit_id, job_id=job.id)


def on_fit_failure(job: Job, connection: Redis, exc_type: Any, exc_value: Any,
                   tb: Any = None) -> None:
    """RQ failure callback (also called for abandoned jobs whose worker died)."""
    from rq.exceptions import AbandonedJobError

    from service.lifecycle import Fit, FitStatus

    fit_id = job.meta.get("fit_id")
    if not fit_id:
        return
    ctx = _context(job, connection)
    retrying = bool(job.retries_left and job.retries_left > 0)
    if exc_type is AbandonedJobError or isinstance(exc_value, AbandonedJobError):
        message = "the worker running this fit stopped (abandoned job)"
    else:
        message = f"{getattr(exc_type, '__name__', 'Error')}: {exc_value}"

    def move(fit: Fit) -> Fit | None:
        if not fit.live or fit.job_id != job.id:
            return None
        if not retrying:
            return fit.fail(message)
        if fit.status is FitStatus.RUNNING:
            return fit.wait_for_retry(message)
        return None

    ctx.storage.fits.change(fit_id, move)


def run_grouping(run_id: str) -> dict[str, Any]:
    """Group the records of grouping run ``run_id`` (the RQ entry point)."""
    from rq import get_current_job

    from service.usecases.grouping_runs import execute_run

    job = get_current_job()
    if job is None:
        raise RuntimeError("run_grouping must run inside an RQ job")
    return execute_run(_context(job), run_id, job.id)


def on_run_failure(job: Job, connection: Redis, exc_type: Any, exc_value: Any,
                   tb: Any = None) -> None:
    """RQ failure callback of a grouping run's job: another job or a failed run
    (:func:`~service.usecases.grouping_runs.job_failed`). A job abandoned by a dead
    worker is left to the warden, which hands the run over once its lease lapses."""
    from rq.exceptions import AbandonedJobError

    from service.usecases.grouping_runs import job_failed

    run_id = job.meta.get("run_id")
    if not run_id or exc_type is AbandonedJobError or isinstance(exc_value, AbandonedJobError):
        return
    job_failed(_context(job, connection), run_id, job.id,
             f"{getattr(exc_type, '__name__', 'Error')}: {exc_value}")
