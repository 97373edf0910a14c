"""Immutable versions, the active pointer and the activation history."""

from __future__ import annotations

import json
from typing import TYPE_CHECKING, Any

from service.lifecycle import Fit, FitStatus

from .codecs import text
from .errors import ActiveChanged, MissingMetric, MissingVersion, StaleAttempt
from .keys import Keys
from .tx import transact

if TYPE_CHECKING:
    import redis
    from redis.client import Pipeline

    from .fits import FitStore

VERSION_FIELDS = ("summary", "report", "metric", "batches", "fit_id", "parent")


class VersionStore:
    def __init__(self, redis: redis.Redis, keys: Keys, fits: FitStore) -> None:
        self.redis, self.keys, self.fits = redis, keys, fits
        self.tallies = fits.tallies

    def active(self, name: str) -> int | None:
        raw = self.redis.get(self.keys.active(name))
        return int(raw) if raw is not None else None

    def next_number(self, name: str) -> int:
        return int(self.redis.incr(self.keys.version_seq(name)))

    def commit(self, name: str, uid: str, n: int, doc: dict[str, Any], *,
               expected_active: int | None, activate: bool, activation: dict[str, Any],
               fit: Fit, reference: bytes | None = None) -> None:
        """Make version ``n`` visible, optionally activate it, and store ``fit`` (its
        succeeded record) and the version's drift ``reference``: one EXEC.

        ``doc`` holds summary, report, metric, batches and parent. Raises ActiveChanged
        if the active version is no longer ``expected_active``, MissingMetric if the
        metric was deleted or re-created, StaleAttempt unless the fit is still running
        under ``fit.job_id``.
        """
        k = self.keys
        mkey, akey, fkey = k.metric(name), k.active(name), k.fit(fit.fit_id)

        def body(pipe: Pipeline) -> None:
            if text(pipe.hget(mkey, "uid")) != uid:
                raise MissingMetric(f"metric {name!r} was deleted during the fit")
            current = pipe.get(akey)
            if (int(current) if current is not None else None) != expected_active:
                raise ActiveChanged("the active version changed")
            stored = self.fits.read(pipe, fit.fit_id)
            if stored is None or stored.status != FitStatus.RUNNING \
                    or stored.job_id != fit.job_id:
                raise StaleAttempt(f"fit {fit.fit_id} is no longer run by job {fit.job_id}")
            pipe.multi()
            pipe.hset(k.version(name, n), mapping={
                "summary": json.dumps(doc["summary"]), "report": json.dumps(doc["report"]),
                "metric": json.dumps(doc["metric"]), "batches": json.dumps(doc["batches"]),
                "fit_id": fit.fit_id, "parent": json.dumps(doc["parent"])})
            pipe.zadd(k.version_index(name), {str(n): n})
            if reference is not None:
                pipe.set(k.drift_reference(name, n), reference)
            if activate:
                pipe.set(akey, n)
                pipe.rpush(k.history(name), json.dumps(activation))
                self.tallies.count_activation(pipe, "fit")
            self.fits.write(pipe, fit, previous=stored)

        transact(self.redis, [mkey, akey, fkey], body)

    def numbers(self, name: str) -> list[int]:
        return [int(v) for v in self.redis.zrange(self.keys.version_index(name), 0, -1)]

    def summaries(self, name: str, after: int | None = None, count: int | None = None
                  ) -> list[dict[str, Any]]:
        """Version summaries by number, after version ``after`` (up to ``count``)."""
        if after is None and count is None:
            nums = self.numbers(name)
        else:
            lo = f"({after}" if after is not None else "-inf"
            nums = [int(v) for v in self.redis.zrangebyscore(
                self.keys.version_index(name), lo, "+inf", start=0, num=count or -1)]
        with self.redis.pipeline(transaction=False) as pipe:
            for n in nums:
                pipe.hget(self.keys.version(name, n), "summary")
            rows = pipe.execute()
        return [json.loads(r) for r in rows if r is not None]

    def get(self, name: str, n: int, fields: tuple[str, ...] | None = None
            ) -> dict[str, Any] | None:
        fields = fields or VERSION_FIELDS
        values = self.redis.hmget(self.keys.version(name, n), list(fields))
        if values[0] is None:
            return None
        out: dict[str, Any] = {}
        for f, v in zip(fields, values, strict=True):
            out[f] = text(v) if f == "fit_id" else (json.loads(v) if v is not None else None)
        return out

    def activate(self, name: str, n: int, entry: dict[str, Any]) -> int | None:
        """Set the active version and append ``entry`` (with ``from`` filled in) to history.

        Returns the previous active version; MissingVersion if ``n`` does not exist.
        """
        akey, vkey = self.keys.active(name), self.keys.version_index(name)

        def body(pipe: Pipeline) -> int | None:
            if pipe.zscore(vkey, str(n)) is None:
                raise MissingVersion(f"metric {name!r} has no version {n}")
            prev_raw = pipe.get(akey)
            prev = int(prev_raw) if prev_raw is not None else None
            pipe.multi()
            pipe.set(akey, n)
            pipe.rpush(self.keys.history(name), json.dumps({**entry, "from": prev, "to": n}))
            self.tallies.count_activation(pipe, "operator")
            return prev

        return transact(self.redis, [akey, vkey], body)

    def history(self, name: str, start: int = 0, count: int | None = None
                ) -> list[dict[str, Any]]:
        """Activations from position ``start`` (oldest first; the list only grows)."""
        stop = -1 if count is None else start + count - 1
        return [json.loads(e) for e in self.redis.lrange(self.keys.history(name), start, stop)]
