"""A fit's states and the only moves between them.

::

    waiting ──start──> running ──succeed──> succeeded
      │  ^               │  │
      │  └──wait_retry───┘  └──fail──> failed ──requeue──> waiting
      │  └──hand_over────┘ (a new job after the attempt's lease lapsed)
      └──────────────fail─────────────^

Every change of a fit record goes through :class:`Fit`'s methods; storage applies a
change atomically (WATCH on the record) and never decides a state itself.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from enum import Enum
from typing import Any

from service.clock import utcnow

# the name ``waiting`` had before (the queue library's word); stored records still read
FORMER_STATUSES = frozenset({"queued"})


class FitStatus(str, Enum):
    WAITING = "waiting"  # for a worker, or for another attempt
    RUNNING = "running"
    SUCCEEDED = "succeeded"
    FAILED = "failed"

    @classmethod
    def _missing_(cls, value: object) -> FitStatus | None:
        """A status under the name it had before (records stored then still read)."""
        return cls.WAITING if value in FORMER_STATUSES else None

    @property
    def live(self) -> bool:
        """Waiting or running: the fit may still produce a version."""
        return self in (FitStatus.WAITING, FitStatus.RUNNING)

    def __str__(self) -> str:
        return self.value


MOVES: dict[FitStatus, frozenset[FitStatus]] = {
    FitStatus.WAITING: frozenset({FitStatus.RUNNING, FitStatus.FAILED, FitStatus.WAITING}),
    FitStatus.RUNNING: frozenset({FitStatus.SUCCEEDED, FitStatus.FAILED, FitStatus.WAITING}),
    FitStatus.FAILED: frozenset({FitStatus.WAITING}),
    FitStatus.SUCCEEDED: frozenset(),
}

# activation policies under the names they had before (records stored then still read)
FORMER_ACTIVATE = {"if_better": "when_better", "always": "at_once", "never": "by_hand"}

PUBLIC_FIELDS = ("fit_id", "metric", "status", "progress", "stage", "params", "version",
                 "error", "decision", "created_at", "started_at", "ended_at",
                 "requested_by", "attempts")


class IllegalMove(Exception):
    """A transition the lifecycle does not allow (e.g. a succeeded fit failing)."""


@dataclass(frozen=True)
class Fit:
    fit_id: str
    metric: str
    metric_uid: str
    params: dict[str, Any]
    requested_by: str
    job_id: str
    dedupe_key: str | None
    created_at: str
    created_ts: float
    status: FitStatus = FitStatus.WAITING
    stage: str = "waiting"
    progress: float = 0.0
    version: int | None = None
    error: str | None = None
    decision: dict[str, Any] | None = None
    started_at: str | None = None
    ended_at: str | None = None
    attempts: int = 0
    runs: int = 0
    retried_by: str | None = None
    extra: dict[str, Any] = field(default_factory=dict)

    # ---- records ---------------------------------------------------------------------
    @classmethod
    def from_record(cls, record: dict[str, Any]) -> Fit:
        names = {f.name for f in dataclasses.fields(cls)} - {"extra"}
        known = {k: v for k, v in record.items() if k in names}
        known["status"] = FitStatus(known.get("status", "waiting"))
        if known.get("stage") in FORMER_STATUSES:
            known["stage"] = "waiting"
        known.setdefault("dedupe_key", None)
        params = known.get("params")
        if isinstance(params, dict) and params.get("activate") in FORMER_ACTIVATE:
            known["params"] = {**params, "activate": FORMER_ACTIVATE[params["activate"]]}
        return cls(**known, extra={k: v for k, v in record.items() if k not in names})

    def to_record(self) -> dict[str, Any]:
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
               if f.name != "extra"}
        out["status"] = self.status.value
        return {**self.extra, **out}

    def public(self) -> dict[str, Any]:
        record = self.to_record()
        return {k: record.get(k) for k in PUBLIC_FIELDS}

    @property
    def live(self) -> bool:
        return self.status.live

    # ---- moves -----------------------------------------------------------------------
    def _to(self, status: FitStatus, **changes: Any) -> Fit:
        if status not in MOVES[self.status]:
            raise IllegalMove(f"fit {self.fit_id} is {self.status}; it cannot become {status}")
        return dataclasses.replace(self, status=status, **changes)

    def start(self) -> Fit:
        """An attempt begins (its job holds the lease)."""
        return self._to(FitStatus.RUNNING, stage="loading", progress=0.0, error=None,
                        started_at=self.started_at or utcnow(), attempts=self.attempts + 1)

    def succeed(self, version: int, decision: dict[str, Any]) -> Fit:
        return self._to(FitStatus.SUCCEEDED, stage="done", progress=1.0, version=version,
                        error=None, decision=decision, ended_at=utcnow())

    def fail(self, error: str) -> Fit:
        return self._to(FitStatus.FAILED, stage="failed", error=error, ended_at=utcnow())

    def wait_for_retry(self, error: str, job_id: str | None = None) -> Fit:
        """A running attempt ended without a result; another attempt follows."""
        return self._to(FitStatus.WAITING, stage="waiting for retry", error=error,
                        job_id=job_id or self.job_id)

    def hand_over(self, error: str, job_id: str) -> Fit:
        """A running attempt died; a new job (a new run) will make the next attempt."""
        return self._to(FitStatus.WAITING, stage="waiting for retry", error=error,
                        job_id=job_id, runs=self.runs + 1)

    def reissue(self, job_id: str) -> Fit:
        """A queued fit's job was lost before its attempt began: a new job, same attempt."""
        return self._to(FitStatus.WAITING, stage="waiting", job_id=job_id, runs=self.runs + 1,
                        error="the queue lost this fit's job before it began; queued again")

    def requeue(self, job_id: str, by: str) -> Fit:
        """A failed fit waits again, put back by a person (same id and parameters)."""
        return self._to(FitStatus.WAITING, stage="waiting", progress=0.0, error=None,
                        decision=None, ended_at=None, job_id=job_id, runs=self.runs + 1,
                        retried_by=by)

    def with_progress(self, stage: str, progress: float) -> Fit:
        return dataclasses.replace(self, stage=stage, progress=progress)
