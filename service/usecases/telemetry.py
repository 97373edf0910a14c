"""The deployment-wide numbers ``/metrics`` reads from Redis at scrape time."""

from __future__ import annotations

from itertools import accumulate
from typing import TYPE_CHECKING, Any

from service.lifecycle import FitStatus
from service.store.tallies import FIT_SECONDS_BUCKETS, FitTally

from . import drift

if TYPE_CHECKING:
    from service.context import Context

OUTCOMES = tuple(s.value for s in FitStatus if not s.live)
ACTIVATED_BY = ("fit", "operator")


def snapshot(ctx: Context) -> dict[str, Any]:
    """Fits ended by outcome (count, run-time histogram with cumulative buckets as
    ``[(le, count), …, ("+Inf", count)]`` and sum), activations by who made them, and
    the queue's depth by state and its oldest wait (0 when none waits), and each
    metric's drift verdict for its active version."""
    tallies = ctx.storage.tallies.read()
    fits = {}
    for outcome in OUTCOMES:
        tally = tallies.fits.get(outcome, FitTally())
        bounds = [*map(str, FIT_SECONDS_BUCKETS), "+Inf"]
        fits[outcome] = {"ended": tally.ended, "seconds": tally.seconds,
                         "buckets": list(zip(bounds, accumulate(tally.buckets), strict=True))}
    activations = {by: tallies.activations.get(by, 0) for by in ACTIVATED_BY}
    counts = ctx.jobs.queue_counts()
    return {"fits": fits, "activations": activations, "drift": drift.latest_verdicts(ctx),
            "queue": {
        "depth": {"waiting": counts["waiting"], "running": counts["fitting"]},
        "oldest_waiting_seconds": counts["oldest_waiting_seconds"] or 0.0}}
