"""Starting an RQ worker on the fit queue.

``run_worker(settings)`` builds a Context and a forking ``rq.Worker`` (each fit runs in
a work horse, so ``Settings.fit_timeout`` is enforced by killing it) and works until
stopped; with ``burst=True`` it returns once the queue is empty. Heartbeats are the
worker's own (``rq.Worker.all`` lists it with ``last_heartbeat``).

A long-running worker also runs the warden (:mod:`service.usecases.warden`) in a
thread on its own Redis connection, sweeping live fits every
``Settings.warden_seconds``; a burst sweeps once when the queue is empty. The maths
core is imported before the first fork, so a work horse starts with scikit-learn and
SciPy already loaded.

RQ's own log sentences are said in our words, or lowered to debug, by
:class:`workers.logwords.QueueWords`, a filter on the handler that
:func:`service.logs.configure` installs (``likewise worker`` calls it before
``run_worker``; ``likewise worker --until-empty`` is ``burst=True``).

A stopping worker ends its command listener (the thread that hears the queue's
stop-job and shut-down messages) within :data:`LISTEN_SECONDS`: RQ's own listener waits
up to a minute between wakes, and its stop joins that thread, so a stop that lost the
race with the unsubscribe reply held ``SIGTERM`` — and every burst's end — for a minute.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from rq import SimpleWorker, Worker

from workers import jobs

if TYPE_CHECKING:
    import redis

    from service.config import Settings

LISTEN_SECONDS = 1.0  # the command listener's longest wait between wakes


class _PromptStop:
    """The command listener of :class:`rq.Worker`, waking every ``LISTEN_SECONDS``."""

    def subscribe(self) -> None:
        w: Any = self
        w.pubsub = w.connection.pubsub()
        w.pubsub.subscribe(**{w.pubsub_channel_name: w.handle_payload})
        w.pubsub_thread = w.pubsub.run_in_thread(
            sleep_time=LISTEN_SECONDS, daemon=True,
            exception_handler=w._pubsub_exception_handler)


class FitWorker(_PromptStop, Worker):
    """A forking worker: each job in a work horse."""


class InlineFitWorker(_PromptStop, SimpleWorker):
    """A worker that runs each job in the worker's own process: no fork, no time limit."""


def build_worker(
    settings: Settings,
    name: str | None = None,
    *,
    simple: bool = False,
    connection: redis.Redis | None = None,
) -> Worker:
    """An RQ worker on ``settings.queue_name`` (not started). ``simple`` runs jobs in
    the worker process itself (no fork, so no timeout enforcement)."""
    from service.context import Context

    ctx = Context.build(settings, connection=connection)
    jobs.worker_settings = settings
    cls = InlineFitWorker if simple else FitWorker
    ttl = heartbeat_ttl(settings.worker_seen_seconds)
    return cls([ctx.queue], connection=ctx.redis, name=name, worker_ttl=ttl,
               job_monitoring_interval=min(30, ttl - 15))


def heartbeat_ttl(seen_seconds: int) -> int:
    """The worker TTL that keeps ``/readyz`` true for a healthy idle worker.

    RQ renews an idle worker's heartbeat once per ``worker_ttl − 15`` s (420 s by
    default); readiness wants one within ``LIKEWISE_WORKER_SEEN_SECONDS``. Beating at
    least twice per window keeps an idle worker visible; a busy one reports at the job
    monitoring interval, capped the same way.
    """
    return max(20, seen_seconds // 2 + 15)


def run_worker(
    settings: Settings,
    burst: bool = False,
    name: str | None = None,
    *,
    simple: bool = False,
    max_jobs: int | None = None,
    connection: redis.Redis | None = None,
    logging_level: str = "WARNING",
) -> Worker:
    """Build a worker and work (until stopped, or until the queue is empty with
    ``burst``); returns the worker."""
    import service.core  # noqa: F401 — loaded once here, inherited by every work horse
    from service.context import Context
    from service.usecases import warden

    worker = build_worker(settings, name, simple=simple, connection=connection)
    own = Context.build(settings) if settings.redis_url else Context.build(
        settings, connection=connection)
    guard = None if burst else warden.Warden(own, settings.warden_seconds)
    if guard is not None:
        guard.start()
    try:
        worker.work(burst=burst, max_jobs=max_jobs, logging_level=logging_level)
    finally:
        if guard is not None:
            guard.stop()
            guard.join(timeout=5)
    if burst:  # a burst leaves no fit behind that only a later sweep would heal
        warden.sweep(own)
    if own.redis is not worker.connection:
        own.close()
    return worker
