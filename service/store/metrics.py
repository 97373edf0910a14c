"""Metric records: name, ordered features, description, uid; their counts; deletion."""

from __future__ import annotations

import json
import time
from typing import TYPE_CHECKING, Any

from service.clock import utcnow

from .codecs import text
from .errors import FeaturesLocked
from .keys import METRIC_SCALARS, Keys
from .tx import transact

if TYPE_CHECKING:
    import redis
    from redis.client import Pipeline


# how a metric reads its tables; ``categories`` is locked with the features (it
# decides the encoding of stored batches), the rest may change at any time
DEFAULT_INPUTS: dict[str, Any] = {
    "categories": {}, "missing_values": "refuse", "ignore_extra_columns": False}


def _decode(name: str, raw: dict[bytes, bytes]) -> dict[str, Any]:
    d = {text(k): text(v) for k, v in raw.items()}
    return {
        "name": name,
        "features": json.loads(d["features"]),
        "inputs": {**DEFAULT_INPUTS, **json.loads(d.get("inputs") or "{}")},
        "description": d.get("description") or "",
        "created_at": d["created_at"],
        "updated_at": d["updated_at"],
        "uid": d["uid"],
    }


class MetricStore:
    def __init__(self, redis: redis.Redis, keys: Keys) -> None:
        self.redis, self.keys = redis, keys

    def get(self, name: str) -> dict[str, Any] | None:
        return self.get_many([name])[0]

    def get_many(self, names: list[str]) -> list[dict[str, Any] | None]:
        """Several metrics in one round trip (None where one does not exist)."""
        with self.redis.pipeline(transaction=False) as pipe:
            for name in names:
                pipe.hgetall(self.keys.metric(name))
            raws = pipe.execute()
        return [_decode(n, raw) if raw else None for n, raw in zip(names, raws, strict=True)]

    def get_with_active(self, name: str) -> tuple[dict[str, Any] | None, int | None]:
        """A metric (None if it does not exist) and its active version, one round trip."""
        with self.redis.pipeline(transaction=False) as pipe:
            pipe.hgetall(self.keys.metric(name))
            pipe.get(self.keys.active(name))
            raw, active = pipe.execute()
        return (_decode(name, raw) if raw else None,
                int(active) if active is not None else None)

    def names(self) -> list[str]:
        return sorted(text(n) for n in self.redis.smembers(self.keys.metric_names()))

    def counts(self, name: str) -> dict[str, Any]:
        """Batches, records, versions and the active version of one metric."""
        return self.counts_many([name])[0]

    def counts_many(self, names: list[str]) -> list[dict[str, Any]]:
        k = self.keys
        with self.redis.pipeline(transaction=False) as pipe:
            for name in names:
                pipe.zcard(k.batch_index(name))
                pipe.get(k.records(name))
                pipe.zcard(k.version_index(name))
                pipe.get(k.active(name))
            values = pipe.execute()
        return [
            {
                "batches": int(batches),
                "records": int(records or 0),
                "versions": int(versions),
                "active_version": int(active) if active is not None else None,
            }
            for batches, records, versions, active in zip(*[iter(values)] * 4, strict=True)
        ]

    def put(self, name: str, features: list[str], description: str, uid: str,
            inputs: dict[str, Any] | None = None) -> tuple[dict[str, Any], str]:
        """Create or update; returns (record, "created"|"updated"|"unchanged").

        Raises FeaturesLocked if the features or the categories change while the
        metric has batches.
        """
        inputs = {**DEFAULT_INPUTS, **(inputs or {})}
        mkey, bkey = self.keys.metric(name), self.keys.batch_index(name)

        def body(pipe: Pipeline) -> tuple[dict[str, Any], str]:
            raw = pipe.hgetall(mkey)
            now = utcnow()
            if not raw:
                fields = {"features": json.dumps(features), "description": description,
                          "created_at": now, "updated_at": now, "uid": uid,
                          "inputs": json.dumps(inputs)}
                pipe.multi()
                # a fit racing an earlier deletion may have left a counter behind
                pipe.delete(*(self.keys.metric(name, s) for s in METRIC_SCALARS))
                pipe.hset(mkey, mapping=fields)
                pipe.sadd(self.keys.metric_names(), name)
                return _decode(name, {k.encode(): v.encode() for k, v in fields.items()}), \
                    "created"
            current = _decode(name, raw)
            if (current["features"], current["description"], current["inputs"]) == (
                    features, description, inputs):
                pipe.multi()
                return current, "unchanged"
            encoding_changes = (current["features"] != features
                                or current["inputs"]["categories"] != inputs["categories"])
            if encoding_changes and pipe.zcard(bkey) > 0:
                raise FeaturesLocked(
                    f"metric {name!r} has batches; its features and categories cannot "
                    "change (delete its batches or create a new metric)")
            pipe.multi()
            pipe.hset(mkey, mapping={"features": json.dumps(features),
                                     "description": description, "updated_at": now,
                                     "inputs": json.dumps(inputs)})
            current.update(features=features, description=description, updated_at=now,
                           inputs=inputs)
            return current, "updated"

        return transact(self.redis, [mkey, bkey], body)

    def delete(self, name: str) -> bool:
        """Delete a metric with its batches, versions (and their drift references),
        history, fits, dedupe keys and grouping runs (their records and results; a
        run being grouped then writes nothing). Drift buckets — summaries, no records
        — are left to expire: their keys carry the metric's uid, which a re-created
        metric does not share."""
        k = self.keys
        mkey = k.metric(name)
        zkeys = [k.batch_index(name), k.version_index(name), k.fit_index(name),
                 k.run_index(name)]

        def body(pipe: Pipeline) -> bool:
            if not pipe.exists(mkey):
                pipe.multi()
                return False
            batch_ids = [text(b) for b in pipe.zrange(zkeys[0], 0, -1)]
            versions = [text(v) for v in pipe.zrange(zkeys[1], 0, -1)]
            fit_ids = [text(f) for f in pipe.zrange(zkeys[2], 0, -1)]
            # the runs whose records have not expired yet (the others left nothing)
            run_ids = [text(r) for r in pipe.zrangebyscore(zkeys[3], time.time(), "+inf")]
            # every dedupe key is named in the record of the fit it points at, and a
            # run's chunk count in its record (one round trip for all; the fits and
            # runs themselves are watched through zkeys)
            reads = self.redis.pipeline(transaction=False)
            for f in fit_ids:
                reads.hget(k.fit(f), "dedupe_key")
            for r in run_ids:
                reads.hget(k.run(r), "n_chunks")
            found = reads.execute()
            dedupe = [json.loads(v) for v in found[:len(fit_ids)] if v is not None]
            chunks = [json.loads(v) if v is not None else 0 for v in found[len(fit_ids):]]
            doomed = [mkey, *zkeys, *(d for d in dedupe if d)]
            doomed += [k.metric(name, s) for s in METRIC_SCALARS]
            doomed += [k.batch(name, b) for b in batch_ids]
            doomed += [k.version(name, v) for v in versions]
            doomed += [k.drift_reference(name, v) for v in versions]
            doomed += [k.fit(f) for f in fit_ids] + [k.lease(f) for f in fit_ids]
            for r, n in zip(run_ids, chunks, strict=True):
                doomed += k.run_keys(r, int(n))
            pipe.multi()
            pipe.delete(*doomed)
            pipe.srem(k.metric_names(), name)
            if fit_ids:
                pipe.srem(k.live_fits(), *fit_ids)
            if run_ids:
                pipe.srem(k.live_runs(), *run_ids)
            return True

        return transact(self.redis, [mkey, *zkeys], body)
