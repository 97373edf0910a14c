"""Deployment-wide counters that ``/metrics`` reads at scrape time (one hash, ``P:tallies``).

They are written in the same EXEC as the change they count — a fit's final move, an
activation — so every web process reports the same numbers and a count never runs
ahead of (or behind) the records. A fit's run time is kept as a histogram: the count
of fits that ended within each bucket (not cumulative; the reader adds them up) and
the sum of their seconds.
"""

from __future__ import annotations

import bisect
from dataclasses import dataclass, field
from datetime import datetime
from typing import TYPE_CHECKING

from .codecs import text

if TYPE_CHECKING:
    import redis
    from redis.client import Pipeline

    from service.lifecycle import Fit

    from .keys import Keys

# upper bounds (seconds) of a fit's run time; a fit runs from a fraction of a second
# (a few small batches) to the fit timeout (30 min by default) — common practice, no source
FIT_SECONDS_BUCKETS = (0.5, 1.0, 2.5, 5.0, 10.0, 30.0, 60.0, 120.0, 300.0, 600.0, 1800.0)


def _seconds(start: str | None, end: str | None) -> float | None:
    if not start or not end:
        return None
    t0 = datetime.fromisoformat(start.replace("Z", "+00:00"))
    t1 = datetime.fromisoformat(end.replace("Z", "+00:00"))
    return max(0.0, (t1 - t0).total_seconds())


@dataclass
class FitTally:
    """Fits that ended with one outcome, and the run time of those that had started."""

    ended: int = 0
    timed: int = 0
    seconds: float = 0.0
    # per bucket of FIT_SECONDS_BUCKETS, plus one for longer runs (not cumulative)
    buckets: list[int] = field(default_factory=lambda: [0] * (len(FIT_SECONDS_BUCKETS) + 1))


@dataclass
class Tallies:
    fits: dict[str, FitTally]
    activations: dict[str, int]


class TallyStore:
    def __init__(self, redis: redis.Redis, keys: Keys) -> None:
        self.redis, self.keys = redis, keys

    def count_fit_end(self, pipe: Pipeline, fit: Fit) -> None:
        """Count a fit that just ended (inside the caller's MULTI). Its run time, from
        its first attempt's start to its end, is observed when it had started."""
        key, outcome = self.keys.tallies(), fit.status.value
        pipe.hincrby(key, f"fits:{outcome}", 1)
        seconds = _seconds(fit.started_at, fit.ended_at)
        if seconds is not None:
            i = bisect.bisect_left(FIT_SECONDS_BUCKETS, seconds)
            pipe.hincrby(key, f"fit-bucket:{outcome}:{i}", 1)
            pipe.hincrbyfloat(key, f"fit-seconds:{outcome}", seconds)

    def count_activation(self, pipe: Pipeline, by: str) -> None:
        """Count a version made active (``by``: ``fit`` or ``operator``)."""
        pipe.hincrby(self.keys.tallies(), f"activations:{by}", 1)

    def read(self) -> Tallies:
        raw = {text(k): text(v) for k, v in self.redis.hgetall(self.keys.tallies()).items()}
        fits: dict[str, FitTally] = {}
        activations: dict[str, int] = {}
        for name, value in raw.items():
            kind, _, rest = name.partition(":")
            if kind == "activations":
                activations[rest] = int(value)
                continue
            outcome, _, index = rest.partition(":")
            tally = fits.setdefault(outcome, FitTally())
            if kind == "fits":
                tally.ended = int(value)
            elif kind == "fit-seconds":
                tally.seconds = float(value)
            elif kind == "fit-bucket" and index.isdigit() and int(index) < len(tally.buckets):
                tally.buckets[int(index)] = int(value)
        for tally in fits.values():
            tally.timed = sum(tally.buckets)
        return Tallies(fits, activations)


__all__ = ["FIT_SECONDS_BUCKETS", "FitTally", "Tallies", "TallyStore"]
