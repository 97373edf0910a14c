"""A grouping run's states and the only moves between them.

A grouping run groups a large table on a worker (``POST …/grouping-runs``)::

    waiting ──begin──> grouping ──finish──> done
      │  ^               │
      │  └──hand_over────┘ (its worker died: a new job)
      │  └──reissue (a lost job, before it began)
      └──────fail──────> failed <──fail──┘

``done`` and ``failed`` are final: a run is posted again, never retried in place
(its records are deleted once it ends). Storage applies a move atomically and never
decides a state itself, as for fits (:mod:`service.lifecycle`).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from enum import Enum
from typing import Any

from service.clock import utcnow
from service.lifecycle import IllegalMove


class RunStatus(str, Enum):
    WAITING = "waiting"  # for a worker (again, after one died)
    GROUPING = "grouping"
    DONE = "done"
    FAILED = "failed"

    @property
    def live(self) -> bool:
        return self in (RunStatus.WAITING, RunStatus.GROUPING)

    def __str__(self) -> str:
        return self.value


MOVES: dict[RunStatus, frozenset[RunStatus]] = {
    RunStatus.WAITING: frozenset({RunStatus.GROUPING, RunStatus.FAILED, RunStatus.WAITING}),
    RunStatus.GROUPING: frozenset({RunStatus.DONE, RunStatus.FAILED, RunStatus.WAITING}),
    RunStatus.DONE: frozenset(),
    RunStatus.FAILED: frozenset(),
}

PUBLIC_FIELDS = ("run_id", "metric", "status", "stage", "progress", "version", "k",
                 "n_records", "has_ids", "error", "outcome", "created_at", "started_at",
                 "ended_at", "expires_at", "requested_by", "attempts")


@dataclass(frozen=True)
class Run:
    run_id: str
    metric: str
    metric_uid: str
    version: int
    k: int | None  # None: the version's rule chooses k
    n_records: int
    n_chunks: int
    chunk_rows: int  # records per stored chunk (the last one may hold fewer)
    has_ids: bool
    requested_by: str
    job_id: str
    created_at: str
    created_ts: float
    imputed: dict[str, Any] = field(default_factory=dict)  # {"count", "by_feature"}
    status: RunStatus = RunStatus.WAITING
    stage: str = "waiting"
    progress: float = 0.0
    error: str | None = None
    outcome: dict[str, Any] | None = None  # k, k_chosen, sizes, imputed once done
    started_at: str | None = None
    ended_at: str | None = None
    expires_at: str | None = None
    attempts: int = 0
    runs: int = 0

    @classmethod
    def from_record(cls, record: dict[str, Any]) -> Run:
        names = {f.name for f in dataclasses.fields(cls)}
        known = {k: v for k, v in record.items() if k in names}
        known["status"] = RunStatus(known.get("status", "waiting"))
        return cls(**known)

    def to_record(self) -> dict[str, Any]:
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        out["status"] = self.status.value
        return out

    def public(self) -> dict[str, Any]:
        record = self.to_record()
        return {k: record.get(k) for k in PUBLIC_FIELDS}

    @property
    def live(self) -> bool:
        return self.status.live

    def _to(self, status: RunStatus, **changes: Any) -> Run:
        if status not in MOVES[self.status]:
            raise IllegalMove(f"grouping run {self.run_id} is {self.status}; "
                              f"it cannot become {status}")
        return dataclasses.replace(self, status=status, **changes)

    def begin(self) -> Run:
        """An attempt begins (its job holds the lease)."""
        return self._to(RunStatus.GROUPING, stage="loading", progress=0.0,
                        started_at=self.started_at or utcnow(), attempts=self.attempts + 1)

    def finish(self, outcome: dict[str, Any], expires_at: str) -> Run:
        return self._to(RunStatus.DONE, stage="done", progress=1.0, error=None,
                        outcome=outcome, ended_at=utcnow(), expires_at=expires_at)

    def fail(self, error: str, expires_at: str | None = None) -> Run:
        return self._to(RunStatus.FAILED, stage="failed", error=error, ended_at=utcnow(),
                        expires_at=expires_at)

    def hand_over(self, error: str, job_id: str) -> Run:
        """A grouping attempt died; a new job (a new run of the queue) takes over."""
        return self._to(RunStatus.WAITING, stage="waiting for another attempt", error=error,
                        job_id=job_id, runs=self.runs + 1)

    def reissue(self, job_id: str) -> Run:
        """A waiting run's job was lost before it began: a new job, same attempt."""
        return self._to(RunStatus.WAITING, stage="waiting", job_id=job_id,
                        runs=self.runs + 1,
                        error="the queue lost this run's job before it began; queued again")
