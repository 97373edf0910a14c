"""Fit records, the dedupe slots of live fits, the live set and attempt leases.

A record changes only through :meth:`FitStore.change`, which reads it under WATCH,
asks a :class:`~service.lifecycle.Fit` method for the next record and writes it in
one EXEC, together with what follows from the move: a fit that is no longer live
frees its dedupe slot and leaves the live set, and a fit that just ended is counted
(:mod:`.tallies`).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING

from service.lifecycle import Fit, FitStatus, IllegalMove

from .codecs import dumps, from_json_fields, json_fields, loads, text
from .errors import MissingMetric
from .keys import Keys
from .leases import RELEASE, Leases
from .tallies import TallyStore
from .tx import transact

if TYPE_CHECKING:
    import redis
    from redis.client import Pipeline

Enqueue = Callable[["Pipeline"], None]

# delete the dedupe key only while it still points at this fit (atomic inside MULTI)
_DROP_DEDUPE = ("if redis.call('GET', KEYS[1]) == ARGV[1] then "
                "return redis.call('DEL', KEYS[1]) end return 0")
_PROGRESS = ("if redis.call('HGET', KEYS[1], 'status') == ARGV[3] then "
             "redis.call('HSET', KEYS[1], 'stage', ARGV[1], 'progress', ARGV[2]) end")


class FitStore(Leases):
    def __init__(self, redis: redis.Redis, keys: Keys, tallies: TallyStore) -> None:
        self.redis, self.keys, self.tallies = redis, keys, tallies

    # ---- reads -----------------------------------------------------------------------
    def get(self, fit_id: str) -> Fit | None:
        return self.get_many([fit_id])[0]

    def get_many(self, fit_ids: list[str]) -> list[Fit | None]:
        """Several fits in one round trip (None where one does not exist)."""
        with self.redis.pipeline(transaction=False) as pipe:
            for fit_id in fit_ids:
                pipe.hgetall(self.keys.fit(fit_id))
            raws = pipe.execute()
        return [Fit.from_record(from_json_fields(raw)) if raw else None for raw in raws]

    def read(self, pipe: Pipeline | redis.Redis, fit_id: str) -> Fit | None:
        """The record through ``pipe`` (e.g. a watching pipeline before MULTI)."""
        raw = pipe.hgetall(self.keys.fit(fit_id))
        return Fit.from_record(from_json_fields(raw)) if raw else None

    def ids(self, metric: str | None = None, metric_names: list[str] | None = None
            ) -> list[str]:
        """Fit ids, oldest first, of one metric or of ``metric_names``."""
        names = [metric] if metric is not None else list(metric_names or [])
        with self.redis.pipeline(transaction=False) as pipe:
            for m in names:
                pipe.zrange(self.keys.fit_index(m), 0, -1, withscores=True)
            ranges = pipe.execute()
        ids = [(s, text(f)) for pairs in ranges for f, s in pairs]
        return [f for _, f in sorted(ids)]

    def ids_before(self, metric_names: list[str], before: tuple[float, str] | None,
                   count: int) -> list[tuple[float, str]]:
        """Up to ``count`` fits of ``metric_names``, newest first, that come after
        ``before`` in that order (creation time, then id), as ``(created_ts, fit_id)``."""
        keys = [self.keys.fit_index(m) for m in metric_names]
        hi = "+inf" if before is None else repr(before[0])
        with self.redis.pipeline(transaction=False) as pipe:
            for key in keys:  # fits created at the very same time as ``before``
                pipe.zcount(key, hi, hi) if before is not None else pipe.echo(b"0")
            ties = [int(t) for t in pipe.execute()] if keys else []
        with self.redis.pipeline(transaction=False) as pipe:
            for key, tie in zip(keys, ties, strict=True):
                pipe.zrevrangebyscore(key, hi, "-inf", start=0, num=count + tie,
                                      withscores=True)
            ranges = pipe.execute() if keys else []
        found = [(float(s), text(f)) for pairs in ranges for f, s in pairs]
        if before is not None:
            found = [p for p in found if p < tuple(before)]
        return sorted(found, reverse=True)[:count]

    def live_ids(self) -> list[str]:
        return sorted(text(f) for f in self.redis.smembers(self.keys.live_fits()))

    def dedupe_key(self, name: str, params_hash: str) -> str:
        return self.keys.dedupe(name, params_hash)

    def dedupe_holder(self, dedupe_key: str) -> Fit | None:
        """The fit a dedupe slot points at (a waiting or running fit with those params)."""
        fit_id = text(self.redis.get(dedupe_key))
        return self.get(fit_id) if fit_id else None

    # ---- writes ----------------------------------------------------------------------
    def write(self, pipe: Pipeline, fit: Fit, previous: Fit | None = None) -> None:
        """Queue the writes of ``fit`` (inside a caller's MULTI)."""
        k = self.keys
        pipe.hset(k.fit(fit.fit_id), mapping=json_fields(fit.to_record()))
        if fit.live:
            pipe.sadd(k.live_fits(), fit.fit_id)
        else:
            pipe.srem(k.live_fits(), fit.fit_id)
            pipe.eval(RELEASE, 1, k.lease(fit.fit_id), fit.job_id)
            if fit.dedupe_key and (previous is None or previous.live):
                pipe.eval(_DROP_DEDUPE, 1, fit.dedupe_key, fit.fit_id)
            if previous is not None and previous.live:
                self.tallies.count_fit_end(pipe, fit)

    def create(self, fit: Fit, enqueue: Enqueue) -> tuple[str, bool]:
        """Store a new fit and enqueue its job in one EXEC, unless its dedupe key points
        at a live fit. Returns (fit_id, created)."""
        k = self.keys
        mkey, dkey = k.metric(fit.metric), fit.dedupe_key
        assert dkey is not None

        def body(pipe: Pipeline) -> tuple[str, bool]:
            if text(pipe.hget(mkey, "uid")) != fit.metric_uid:
                raise MissingMetric(f"metric {fit.metric!r} does not exist")
            existing = text(pipe.get(dkey))
            if existing:
                status = pipe.hget(k.fit(existing), "status")
                if status is not None and FitStatus(loads(status)).live:
                    pipe.multi()
                    return existing, False
            pipe.multi()
            self.write(pipe, fit)
            pipe.zadd(k.fit_index(fit.metric), {fit.fit_id: fit.created_ts})
            pipe.set(dkey, fit.fit_id)
            enqueue(pipe)
            return fit.fit_id, True

        return transact(self.redis, [mkey, dkey], body)

    def change(self, fit_id: str, move: Callable[[Fit], Fit | None],
               enqueue: Enqueue | None = None) -> Fit | None:
        """Apply ``move`` to the stored fit atomically; returns the new fit, or None when
        the fit does not exist, ``move`` returns None or the lifecycle forbids it.
        ``enqueue`` (a job for the new state) goes in the same EXEC."""
        fkey = self.keys.fit(fit_id)

        def body(pipe: Pipeline) -> Fit | None:
            current = self.read(pipe, fit_id)
            try:
                new = move(current) if current is not None else None
            except IllegalMove:
                new = None
            pipe.multi()
            if new is None:
                return None
            self.write(pipe, new, previous=current)
            if enqueue is not None:
                enqueue(pipe)
            return new

        return transact(self.redis, [fkey], body)

    def set_progress(self, fit_id: str, stage: str, progress: float) -> None:
        """Progress of a running fit; never re-creates a deleted record or changes
        one that is no longer running."""
        self.redis.eval(_PROGRESS, 1, self.keys.fit(fit_id), dumps(stage), dumps(progress),
                        dumps(FitStatus.RUNNING.value))

    def _lease_key(self, owner: str) -> str:
        return self.keys.lease(owner)

    def forget_live(self, fit_id: str) -> None:
        """Drop an id from the live set (its record is gone)."""
        self.redis.srem(self.keys.live_fits(), fit_id)


__all__ = ["Enqueue", "FitStore"]
