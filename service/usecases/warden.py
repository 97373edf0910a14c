"""The warden: brings live fits in line with their queue jobs, so reads never write.

A fit is waiting or running until a worker finishes it. When a worker dies, a job is
deleted or an operator stops it, the fit record alone would say "running" forever.
The warden runs in every worker process (``workers.worker``, every
``Settings.warden_interval`` seconds) and :func:`sweep` checks each live fit:

- a running fit whose attempt's lease lapsed (its worker died) gets a new job while
  attempts are left (``Settings.fit_retries``), else fails;
- a queued fit whose job is stranded — taken by a worker that died before the fit
  began, or lost between the queue's moves in a crash — gets a new job (the attempt
  never began, so none is spent), after ``Settings.stranded_seconds``;
- the queue hands back jobs whose worker stopped heartbeating (retried while
  retries are left, else failed);
- a fit whose job no longer exists fails ("the queue job of this fit no longer exists");
- a fit whose job failed or was stopped fails with the job's error;
- a running fit whose job waits for a retry goes back to waiting.

Grouping runs follow the same rules (:func:`service.usecases.grouping_runs.check_run`).

Every write is fenced on the job id the fit record names, so a fit that moved on
(retried by a person, finished meanwhile) is left alone.
"""

from __future__ import annotations

import logging
import threading
from typing import TYPE_CHECKING

from service.jobqueue import JobState
from service.lifecycle import Fit, FitStatus
from service.store import UNAVAILABLE

from . import grouping_runs

if TYPE_CHECKING:
    from service.context import Context

log = logging.getLogger(__name__)


def _move(fit: Fit, state: JobState, error: str | None) -> Fit | None:
    if state is JobState.MISSING:
        return fit.fail("the queue job of this fit no longer exists")
    if state is JobState.FAILED:
        return fit.fail(fit.error or error or "the fit job failed")
    if state is JobState.STOPPED:
        return fit.fail("the fit job was stopped")
    if state is JobState.DONE and fit.live:
        return fit.fail("the fit job ended without recording a result")
    if state is JobState.WAITING and fit.status is FitStatus.RUNNING:
        return fit.wait_for_retry(fit.error or "the attempt stopped; waiting for a retry")
    return None


def check_fit(ctx: Context, fit: Fit) -> Fit:
    """Bring one fit in line with its job; returns the fit as stored afterwards.

    The write is fenced on what the decision read (status, job id, attempts): an
    attempt that started meanwhile, or a fit that finished, is left alone.
    """
    if not fit.live:
        return fit
    state, error = None, None
    if fit.status is FitStatus.RUNNING and ctx.storage.fits.lease_holder(fit.fit_id) is None:
        # its worker died; a job the queue already failed or stopped says why (a work
        # horse that was killed, say), however long ago the lease lapsed
        state, error = ctx.jobs.job_state(fit.job_id)
        if state not in (JobState.FAILED, JobState.STOPPED):
            return _hand_over(ctx, fit)
    if fit.status is FitStatus.WAITING and ctx.jobs.stranded(
            fit.job_id, ctx.settings.stranded_seconds):
        return _reissue(ctx, fit)
    if state is None:
        state, error = ctx.jobs.job_state(fit.job_id)
    if _move(fit, state, error) is None:
        return fit
    seen = (fit.status, fit.job_id, fit.attempts)
    changed = ctx.storage.fits.change(
        fit.fit_id,
        lambda f: _move(f, state, error) if (f.status, f.job_id, f.attempts) == seen
        else None)
    return changed or ctx.storage.fits.get(fit.fit_id) or fit


def _reissue(ctx: Context, fit: Fit) -> Fit:
    seen = (fit.status, fit.job_id, fit.attempts)
    job_id = ctx.jobs.job_id_for(fit.fit_id, fit.runs + 1)
    changed = ctx.storage.fits.change(
        fit.fit_id, lambda f: f.reissue(job_id)
        if (f.status, f.job_id, f.attempts) == seen else None,
        enqueue=ctx.jobs.enqueuer(fit.fit_id, job_id))
    if changed is not None:
        log.warning("fit %s: its queue job %s was stranded; queued again as %s",
                    fit.fit_id, fit.job_id, job_id)
        ctx.jobs.forget(fit.job_id)
    return changed or ctx.storage.fits.get(fit.fit_id) or fit


def _hand_over(ctx: Context, fit: Fit) -> Fit:
    """A running fit whose attempt's lease lapsed: its worker died. Queue a new job
    (while attempts are left) or fail it; the old job is forgotten by the queue."""
    seen = (fit.status, fit.job_id, fit.attempts)
    message = "the worker running this fit stopped"
    if fit.attempts > ctx.settings.fit_retries:
        changed = ctx.storage.fits.change(
            fit.fit_id, lambda f: f.fail(f"{message} ({f.attempts} attempts)")
            if (f.status, f.job_id, f.attempts) == seen else None)
    else:
        job_id = ctx.jobs.job_id_for(fit.fit_id, fit.runs + 1)
        changed = ctx.storage.fits.change(
            fit.fit_id, lambda f: f.hand_over(f"{message}; it waits for another attempt", job_id)
            if (f.status, f.job_id, f.attempts) == seen else None,
            enqueue=ctx.jobs.enqueuer(fit.fit_id, job_id))
    if changed is not None:
        ctx.jobs.forget(fit.job_id)
    return changed or ctx.storage.fits.get(fit.fit_id) or fit


def sweep(ctx: Context) -> int:
    """One pass over every live fit and grouping run of this deployment; returns how
    many changed."""
    ctx.jobs.heal_stalled()
    ids = ctx.storage.fits.live_ids()
    changed = 0
    for fit_id, fit in zip(ids, ctx.storage.fits.get_many(ids), strict=True):
        if fit is None:
            ctx.storage.fits.forget_live(fit_id)
            continue
        if check_fit(ctx, fit) != fit:
            changed += 1
    return changed + grouping_runs.sweep(ctx)  # grouping runs: the same rules, their own


class Warden(threading.Thread):
    """A daemon thread that sweeps every ``interval`` seconds until :meth:`stop`."""

    def __init__(self, ctx: Context, interval: float) -> None:
        super().__init__(name="likewise-warden", daemon=True)
        self.ctx, self.interval = ctx, interval
        self._stopped = threading.Event()

    def run(self) -> None:
        while not self._stopped.wait(self.interval):
            try:
                sweep(self.ctx)
            except UNAVAILABLE as exc:
                log.warning("warden: the data store did not answer (%s)", exc)
            except Exception:  # noqa: BLE001 — the warden must outlive one bad pass
                log.exception("warden: a sweep failed")

    def stop(self) -> None:
        self._stopped.set()
