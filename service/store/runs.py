"""Grouping runs: their records, their records' chunks, result chunks and leases.

A run is created in one EXEC with every chunk of its validated matrix (and of its id
column) and its queue job, so an acknowledged run has all it needs. A record changes
only through :meth:`RunStore.change` (WATCH on the record, one EXEC), together with
what follows: a run that ends leaves the live set, its input chunks are deleted and
the record, id and result chunks expire after the retention the caller passes.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from typing import TYPE_CHECKING

from service.lifecycle import IllegalMove
from service.run_lifecycle import Run, RunStatus

from .codecs import dumps, from_json_fields, json_fields, text
from .errors import MissingMetric
from .fits import Enqueue
from .keys import Keys
from .leases import RELEASE, Leases
from .tx import transact

if TYPE_CHECKING:
    import redis
    from redis.client import Pipeline

Writes = Callable[["Pipeline"], None]
_PROGRESS = ("if redis.call('HGET', KEYS[1], 'status') == ARGV[3] then "
             "redis.call('HSET', KEYS[1], 'stage', ARGV[1], 'progress', ARGV[2]) end")


class RunStore(Leases):
    def __init__(self, redis: redis.Redis, keys: Keys) -> None:
        self.redis, self.keys = redis, keys

    # ---- reads -----------------------------------------------------------------------
    def get(self, run_id: str) -> Run | None:
        return self.read(self.redis, run_id)

    def read(self, pipe: Pipeline | redis.Redis, run_id: str) -> Run | None:
        raw = pipe.hgetall(self.keys.run(run_id))
        return Run.from_record(from_json_fields(raw)) if raw else None

    def live_ids(self) -> list[str]:
        return sorted(text(r) for r in self.redis.smembers(self.keys.live_runs()))

    def inputs(self, run: Run) -> list[bytes | None]:
        """The stored chunks of a run's matrix, in order (None where one is gone)."""
        with self.redis.pipeline(transaction=False) as pipe:
            for i in range(run.n_chunks):
                pipe.get(self.keys.run_input(run.run_id, i))
            return pipe.execute()

    def results(self, run: Run, chunks: range) -> list[tuple[bytes | None, bytes | None]]:
        """Result chunks (and id chunks, None without an id column) of a done run."""
        with self.redis.pipeline(transaction=False) as pipe:
            for i in chunks:
                pipe.get(self.keys.run_output(run.run_id, i))
                pipe.get(self.keys.run_ids(run.run_id, i)) if run.has_ids else pipe.echo(b"")
            raw = pipe.execute()
        return [(raw[j], raw[j + 1] if run.has_ids else None) for j in range(0, len(raw), 2)]

    # ---- writes ----------------------------------------------------------------------
    def create(self, run: Run, chunks: list[bytes], id_chunks: list[bytes] | None,
               enqueue: Enqueue) -> None:
        """Store a new run, its chunks and its job in one EXEC (while its metric is
        the incarnation the run was validated against)."""
        k = self.keys
        mkey = k.metric(run.metric)

        def body(pipe: Pipeline) -> None:
            if text(pipe.hget(mkey, "uid")) != run.metric_uid:
                raise MissingMetric(f"metric {run.metric!r} does not exist")
            pipe.multi()
            for i, blob in enumerate(chunks):
                pipe.set(k.run_input(run.run_id, i), blob)
            for i, blob in enumerate(id_chunks or ()):
                pipe.set(k.run_ids(run.run_id, i), blob)
            pipe.hset(k.run(run.run_id), mapping=json_fields(run.to_record()))
            pipe.sadd(k.live_runs(), run.run_id)
            index = k.run_index(run.metric)
            pipe.zremrangebyscore(index, "-inf", time.time())  # runs expired since
            pipe.zadd(index, {run.run_id: float("inf")})
            enqueue(pipe)

        transact(self.redis, [mkey], body)

    def change(self, run_id: str, move: Callable[[Run], Run | None], *,
               keep_seconds: int | None = None, enqueue: Enqueue | None = None,
               also: Writes | None = None) -> Run | None:
        """Apply ``move`` atomically; returns the new run, or None when it does not
        exist, ``move`` returns None or the lifecycle forbids it. A run that ends is
        kept ``keep_seconds``; ``enqueue`` and ``also`` go in the same EXEC."""
        k = self.keys

        def body(pipe: Pipeline) -> Run | None:
            current = self.read(pipe, run_id)
            try:
                new = move(current) if current is not None else None
            except IllegalMove:
                new = None
            pipe.multi()
            if new is None or current is None:
                return None
            if also is not None:
                also(pipe)
            pipe.hset(k.run(run_id), mapping=json_fields(new.to_record()))
            if not new.live:
                pipe.srem(k.live_runs(), run_id)
                pipe.eval(RELEASE, 1, k.run_lease(run_id), new.job_id)
                pipe.delete(*(k.run_input(run_id, i) for i in range(new.n_chunks)))
                ttl = max(1, int(keep_seconds or 1))
                pipe.expire(k.run(run_id), ttl)
                # the metric's index learns when the record goes (xx: a deleted
                # metric's index is not made again)
                pipe.zadd(k.run_index(new.metric), {run_id: time.time() + ttl}, xx=True)
                for i in range(new.n_chunks):
                    pipe.expire(k.run_output(run_id, i), ttl)
                    if new.has_ids:
                        pipe.expire(k.run_ids(run_id, i), ttl)
            if enqueue is not None:
                enqueue(pipe)
            return new

        return transact(self.redis, [k.run(run_id)], body)

    def write_outputs(self, run_id: str, outputs: list[bytes]) -> Writes:
        """The writes of a run's result chunks (for :meth:`change`'s ``also``)."""
        def writes(pipe: Pipeline) -> None:
            for i, blob in enumerate(outputs):
                pipe.set(self.keys.run_output(run_id, i), blob)
        return writes

    def set_progress(self, run_id: str, stage: str, progress: float) -> None:
        """Progress of a grouping run; never re-creates a deleted record."""
        self.redis.eval(_PROGRESS, 1, self.keys.run(run_id), dumps(stage), dumps(progress),
                        dumps(RunStatus.GROUPING.value))

    def delete(self, run: Run) -> None:
        with self.redis.pipeline(transaction=True) as pipe:
            pipe.delete(*self.keys.run_keys(run.run_id, run.n_chunks))
            pipe.srem(self.keys.live_runs(), run.run_id)
            pipe.zrem(self.keys.run_index(run.metric), run.run_id)
            pipe.execute()

    def forget_live(self, run_id: str) -> None:
        self.redis.srem(self.keys.live_runs(), run_id)

    def _lease_key(self, owner: str) -> str:
        return self.keys.run_lease(owner)


__all__ = ["RunStore"]
