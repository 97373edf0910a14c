"""Every Redis key of likewise lives here, under one configurable prefix.

Key layout (``P`` = the deployment's key prefix; metric names match
``[a-z0-9_-]{1,64}`` so they never contain ``:``)::

    P:metrics                       set    metric names
    P:metric:{name}                 hash   features (JSON), description, created_at,
                                           updated_at, uid (changes when re-created)
    P:metric:{name}:records         string records in all batches (INCRBY/DECRBY)
    P:metric:{name}:batches         zset   batch ids, scored by ingest order
    P:metric:{name}:batch:{id}      hash   meta (JSON), stats (BatchStats.to_bytes()),
                                           matrix (zlib: header + float64 LE), labels (zlib JSON)
    P:metric:{name}:vseq            string version counter (INCR; a crashed fit leaves a gap)
    P:metric:{name}:versions        zset   visible version numbers
    P:metric:{name}:version:{n}     hash   summary, report, metric, batches (JSON), fit_id, parent
    P:metric:{name}:active          string active version number
    P:metric:{name}:history         list   activations (JSON), oldest first
    P:metric:{name}:fits            zset   fit ids of this metric, by creation time
    P:metric:{name}:dedupe:{hash}   string fit id of a queued/running fit with these params
    P:fit:{fit_id}                  hash   fit record fields (JSON values)
    P:batchseq                      string ingest order of batches (INCR)

Raw batches are kept for held-out scoring, compressed with zlib. Size cap: a batch
may have at most ``Settings.max_batch_records`` rows and its raw float64 matrix at
most ``Settings.max_batch_bytes`` (64 MiB by default, i.e. 8 388 608 numbers); the
use case answers 413 beyond that, before anything is written.

Writes that belong together run in one MULTI/EXEC; read-check-write sequences WATCH
the keys they depend on and retry on a concurrent change.
"""

from __future__ import annotations

import json
import struct
import zlib
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

import numpy as np
import redis as redis_lib

from service.errors import Conflict, NotFound

if TYPE_CHECKING:
    from redis.client import Pipeline

_MATRIX_HEADER = struct.Struct("<4sqq")
_MATRIX_MAGIC = b"LWM1"
_WATCH_RETRIES = 20


def utcnow() -> str:
    """Current UTC time, ISO 8601 with milliseconds and a ``Z``."""
    return iso_utc(datetime.now(timezone.utc))


def iso_utc(dt: datetime) -> str:
    """An aware time as ISO 8601 UTC with milliseconds and a ``Z``."""
    return dt.astimezone(timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def _s(value: bytes | str | None) -> str | None:
    return value.decode() if isinstance(value, bytes) else value


def pack_matrix(X: np.ndarray) -> bytes:
    arr = np.ascontiguousarray(X, dtype="<f8")
    header = _MATRIX_HEADER.pack(_MATRIX_MAGIC, arr.shape[0], arr.shape[1])
    packer = zlib.compressobj(6)  # compressed from the array's memory, not a bytes copy
    return packer.compress(header) + packer.compress(memoryview(arr)) + packer.flush()


def unpack_matrix(blob: bytes) -> np.ndarray:
    raw = zlib.decompress(blob)
    magic, n, d = _MATRIX_HEADER.unpack_from(raw)
    if magic != _MATRIX_MAGIC:
        raise ValueError("not a stored matrix")
    return np.frombuffer(raw, dtype="<f8", offset=_MATRIX_HEADER.size).reshape(n, d).astype(float)


def pack_json(value: Any) -> bytes:
    return zlib.compress(json.dumps(value, separators=(",", ":")).encode(), 6)


def unpack_json(blob: bytes) -> Any:
    return json.loads(zlib.decompress(blob))


class ActiveChanged(Exception):
    """The active version changed between a decision and its commit."""


class Storage:
    """Redis access for one deployment (``prefix``). Returns plain Python data."""

    def __init__(self, redis: redis_lib.Redis, prefix: str) -> None:
        self.redis = redis
        self.prefix = prefix

    # ---- key names -------------------------------------------------------------------
    def key(self, *parts: object) -> str:
        return ":".join([self.prefix, *map(str, parts)])

    def _m(self, name: str, *parts: object) -> str:
        return self.key("metric", name, *parts)

    @contextmanager
    def _watching(self, *keys: str) -> Iterator[Pipeline]:
        with self.redis.pipeline(transaction=True) as pipe:
            pipe.watch(*keys)
            yield pipe

    def _transact(self, keys: list[str], body: Callable[[Pipeline], Any]) -> Any:
        """Run ``body(pipe)`` (reads, then ``pipe.multi()`` and writes) until EXEC succeeds."""
        for _ in range(_WATCH_RETRIES):
            try:
                with self._watching(*keys) as pipe:
                    result = body(pipe)
                    pipe.execute()
                    return result
            except redis_lib.WatchError:
                continue
        raise Conflict("too many concurrent changes; try again")

    # ---- metrics ---------------------------------------------------------------------
    @staticmethod
    def _decode_metric(name: str, raw: dict[bytes, bytes]) -> dict[str, Any]:
        d = {_s(k): _s(v) for k, v in raw.items()}
        return {
            "name": name,
            "features": json.loads(d["features"]),
            "description": d.get("description") or "",
            "created_at": d["created_at"],
            "updated_at": d["updated_at"],
            "uid": d["uid"],
        }

    def get_metric(self, name: str) -> dict[str, Any] | None:
        return self.get_metrics([name])[0]

    def get_metrics(self, names: list[str]) -> list[dict[str, Any] | None]:
        """Several metrics in one round trip (None where one does not exist)."""
        with self.redis.pipeline(transaction=False) as pipe:
            for name in names:
                pipe.hgetall(self._m(name))
            raws = pipe.execute()
        return [self._decode_metric(n, raw) if raw else None
                for n, raw in zip(names, raws, strict=True)]

    def metric_names(self) -> list[str]:
        return sorted(_s(n) for n in self.redis.smembers(self.key("metrics")))

    def counts(self, name: str) -> dict[str, Any]:
        """Batches, records, versions and the active version of one metric."""
        return self.counts_many([name])[0]

    def counts_many(self, names: list[str]) -> list[dict[str, Any]]:
        """:meth:`counts` of several metrics in one round trip."""
        with self.redis.pipeline(transaction=False) as pipe:
            for name in names:
                pipe.zcard(self._m(name, "batches"))
                pipe.get(self._m(name, "records"))
                pipe.zcard(self._m(name, "versions"))
                pipe.get(self._m(name, "active"))
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

    def put_metric(
        self, name: str, features: list[str], description: str, uid: str
    ) -> tuple[dict[str, Any], str]:
        """Create or update; returns (record, "created"|"updated"|"unchanged").

        Raises Conflict if the features change while the metric has batches.
        """
        mkey, bkey = self._m(name), self._m(name, "batches")

        def body(pipe: Pipeline) -> tuple[dict[str, Any], str]:
            raw = pipe.hgetall(mkey)
            now = utcnow()
            if not raw:
                fields = {"features": json.dumps(features), "description": description,
                          "created_at": now, "updated_at": now, "uid": uid}
                pipe.multi()
                # a fit racing an earlier deletion may have left a counter behind
                pipe.delete(*(self._m(name, k) for k in ("vseq", "records", "active", "history")))
                pipe.hset(mkey, mapping=fields)
                pipe.sadd(self.key("metrics"), name)
                return self._decode_metric(name, {k.encode(): v.encode()
                                                  for k, v in fields.items()}), "created"
            current = self._decode_metric(name, raw)
            if current["features"] == features and current["description"] == description:
                pipe.multi()
                return current, "unchanged"
            if current["features"] != features and pipe.zcard(bkey) > 0:
                raise Conflict(
                    f"metric {name!r} has batches; its features cannot change "
                    "(delete its batches or create a new metric)",
                    [{"field": "features", "message": "cannot change while batches exist"}],
                )
            pipe.multi()
            pipe.hset(mkey, mapping={"features": json.dumps(features),
                                     "description": description, "updated_at": now})
            current.update(features=features, description=description, updated_at=now)
            return current, "updated"

        return self._transact([mkey, bkey], body)

    def delete_metric(self, name: str) -> bool:
        """Delete a metric with its batches, versions, history, fits and dedupe keys."""
        mkey = self._m(name)
        zkeys = [self._m(name, z) for z in ("batches", "versions", "fits")]

        def body(pipe: Pipeline) -> bool:
            if not pipe.exists(mkey):
                pipe.multi()
                return False
            batch_ids = [_s(b) for b in pipe.zrange(zkeys[0], 0, -1)]
            versions = [_s(v) for v in pipe.zrange(zkeys[1], 0, -1)]
            fit_ids = [_s(f) for f in pipe.zrange(zkeys[2], 0, -1)]
            # every dedupe key is named in the record of the fit it points at (one
            # round trip for all; the fits themselves are watched through zkeys)
            reads = self.redis.pipeline(transaction=False)
            for f in fit_ids:
                reads.hget(self.key("fit", f), "dedupe_key")
            dedupe = [json.loads(v) for v in reads.execute() if v is not None]
            doomed = [mkey, *zkeys, *dedupe]
            doomed += [self._m(name, s) for s in ("records", "vseq", "active", "history")]
            doomed += [self._m(name, "batch", b) for b in batch_ids]
            doomed += [self._m(name, "version", v) for v in versions]
            doomed += [self.key("fit", f) for f in fit_ids]
            pipe.multi()
            pipe.delete(*doomed)
            pipe.srem(self.key("metrics"), name)
            return True

        return self._transact([mkey, *zkeys], body)

    # ---- batches ---------------------------------------------------------------------
    def add_batch(
        self, name: str, uid: str, batch_id: str, meta: dict[str, Any],
        stats: bytes, matrix: bytes, labels: bytes,
    ) -> None:
        """Store one batch atomically; NotFound if the metric vanished or was re-created."""
        mkey = self._m(name)

        def body(pipe: Pipeline) -> None:
            if _s(pipe.hget(mkey, "uid")) != uid:
                raise NotFound(f"metric {name!r} does not exist")
            seq = pipe.incr(self.key("batchseq"))
            pipe.multi()
            pipe.hset(self._m(name, "batch", batch_id), mapping={
                "meta": json.dumps(meta), "stats": stats, "matrix": matrix, "labels": labels})
            pipe.zadd(self._m(name, "batches"), {batch_id: seq})
            pipe.incrby(self._m(name, "records"), int(meta["records"]))

        self._transact([mkey], body)

    def list_batches(self, name: str) -> list[dict[str, Any]]:
        ids = [_s(b) for b in self.redis.zrange(self._m(name, "batches"), 0, -1)]
        if not ids:
            return []
        with self.redis.pipeline(transaction=False) as pipe:
            for b in ids:
                pipe.hget(self._m(name, "batch", b), "meta")
            metas = pipe.execute()
        return [json.loads(m) for m in metas if m is not None]

    def get_batch_meta(self, name: str, batch_id: str) -> dict[str, Any] | None:
        raw = self.redis.hget(self._m(name, "batch", batch_id), "meta")
        return json.loads(raw) if raw is not None else None

    def load_batches(self, name: str) -> list[dict[str, Any]]:
        """All batches with ``meta``, ``stats`` (bytes), ``X`` (ndarray), ``labels`` (list)."""
        ids = [_s(b) for b in self.redis.zrange(self._m(name, "batches"), 0, -1)]
        with self.redis.pipeline(transaction=True) as pipe:  # one consistent snapshot
            for b in ids:
                pipe.hmget(self._m(name, "batch", b), ["meta", "stats", "matrix", "labels"])
            rows = pipe.execute()
        out = []
        for meta, stats, matrix, labels in rows:
            if meta is None:  # deleted between ZRANGE and the reads
                continue
            out.append({"meta": json.loads(meta), "stats": stats,
                        "X": unpack_matrix(matrix), "labels": unpack_json(labels)})
        return out

    def delete_batch(self, name: str, batch_id: str) -> bool:
        bkey = self._m(name, "batch", batch_id)

        def body(pipe: Pipeline) -> bool:
            meta = pipe.hget(bkey, "meta")
            pipe.multi()
            if meta is None:
                return False
            pipe.delete(bkey)
            pipe.zrem(self._m(name, "batches"), batch_id)
            pipe.decrby(self._m(name, "records"), int(json.loads(meta)["records"]))
            return True

        return self._transact([bkey], body)

    # ---- versions --------------------------------------------------------------------
    def active_version(self, name: str) -> int | None:
        raw = self.redis.get(self._m(name, "active"))
        return int(raw) if raw is not None else None

    def next_version_number(self, name: str) -> int:
        return int(self.redis.incr(self._m(name, "vseq")))

    def commit_version(
        self, name: str, uid: str, n: int, doc: dict[str, Any], *,
        expected_active: int | None, activate: bool, activation: dict[str, Any],
        fit_id: str, fit_fields: dict[str, Any],
    ) -> None:
        """Make version ``n`` visible, optionally activate it, and finish its fit: one EXEC.

        ``doc`` holds summary, report, metric, batches and parent. Raises ActiveChanged
        if the active version is no longer ``expected_active``, NotFound if the metric
        was deleted or re-created.
        """
        mkey, akey, fkey = self._m(name), self._m(name, "active"), self.key("fit", fit_id)

        def body(pipe: Pipeline) -> None:
            if _s(pipe.hget(mkey, "uid")) != uid:
                raise NotFound(f"metric {name!r} was deleted during the fit")
            current = pipe.get(akey)
            if (int(current) if current is not None else None) != expected_active:
                raise ActiveChanged()
            dedupe_raw = pipe.hget(fkey, "dedupe_key")
            dedupe = json.loads(dedupe_raw) if dedupe_raw is not None else None
            pipe.multi()
            pipe.hset(self._m(name, "version", n), mapping={
                "summary": json.dumps(doc["summary"]), "report": json.dumps(doc["report"]),
                "metric": json.dumps(doc["metric"]), "batches": json.dumps(doc["batches"]),
                "fit_id": fit_id, "parent": json.dumps(doc["parent"])})
            pipe.zadd(self._m(name, "versions"), {str(n): n})
            if activate:
                pipe.set(akey, n)
                pipe.rpush(self._m(name, "history"), json.dumps(activation))
            self._write_fit(pipe, fit_id, fit_fields)
            if dedupe:
                self._drop_dedupe(pipe, dedupe, fit_id)

        self._transact([mkey, akey, fkey], body)

    def version_numbers(self, name: str) -> list[int]:
        return [int(v) for v in self.redis.zrange(self._m(name, "versions"), 0, -1)]

    def list_version_summaries(self, name: str) -> list[dict[str, Any]]:
        nums = self.version_numbers(name)
        with self.redis.pipeline(transaction=False) as pipe:
            for n in nums:
                pipe.hget(self._m(name, "version", n), "summary")
            rows = pipe.execute()
        return [json.loads(r) for r in rows if r is not None]

    def get_version(self, name: str, n: int, fields: tuple[str, ...] | None = None
                    ) -> dict[str, Any] | None:
        fields = fields or ("summary", "report", "metric", "batches", "fit_id", "parent")
        values = self.redis.hmget(self._m(name, "version", n), list(fields))
        if values[0] is None:
            return None
        out: dict[str, Any] = {}
        for f, v in zip(fields, values, strict=True):
            out[f] = _s(v) if f == "fit_id" else (json.loads(v) if v is not None else None)
        return out

    def activate(self, name: str, n: int, entry: dict[str, Any]) -> int | None:
        """Set the active version and append ``entry`` (with ``from`` filled in) to history.

        Returns the previous active version; NotFound if version ``n`` does not exist.
        """
        akey, vkey = self._m(name, "active"), self._m(name, "versions")

        def body(pipe: Pipeline) -> int | None:
            if pipe.zscore(vkey, str(n)) is None:
                raise NotFound(f"metric {name!r} has no version {n}")
            prev_raw = pipe.get(akey)
            prev = int(prev_raw) if prev_raw is not None else None
            pipe.multi()
            pipe.set(akey, n)
            pipe.rpush(self._m(name, "history"), json.dumps({**entry, "from": prev, "to": n}))
            return prev

        return self._transact([akey, vkey], body)

    def history(self, name: str) -> list[dict[str, Any]]:
        return [json.loads(e) for e in self.redis.lrange(self._m(name, "history"), 0, -1)]

    # ---- fits ------------------------------------------------------------------------
    def _write_fit(self, pipe: Pipeline | redis_lib.Redis, fit_id: str,
                   fields: dict[str, Any]) -> None:
        pipe.hset(self.key("fit", fit_id),
                  mapping={k: json.dumps(v) for k, v in fields.items()})

    def get_fit(self, fit_id: str) -> dict[str, Any] | None:
        return self.get_fits([fit_id])[0]

    def get_fits(self, fit_ids: list[str]) -> list[dict[str, Any] | None]:
        """Several fit records in one round trip (None where one does not exist)."""
        with self.redis.pipeline(transaction=False) as pipe:
            for fit_id in fit_ids:
                pipe.hgetall(self.key("fit", fit_id))
            raws = pipe.execute()
        return [{_s(k): json.loads(v) for k, v in raw.items()} if raw else None for raw in raws]

    def set_fit_progress(self, fit_id: str, stage: str, progress: float) -> None:
        """Progress of a running fit; never re-creates a deleted fit record."""
        self.redis.eval(
            "if redis.call('EXISTS', KEYS[1]) == 1 then "
            "redis.call('HSET', KEYS[1], 'stage', ARGV[1], 'progress', ARGV[2]) end", 1,
            self.key("fit", fit_id), json.dumps(stage), json.dumps(progress))

    def update_fit(self, fit_id: str, fields: dict[str, Any],
                   only_if: Callable[[dict[str, Any]], bool] | None = None) -> bool:
        """Update fields of an existing fit (optionally only if ``only_if(record)``)."""
        fkey = self.key("fit", fit_id)

        def body(pipe: Pipeline) -> bool:
            raw = pipe.hgetall(fkey)
            record = {_s(k): json.loads(v) for k, v in raw.items()}
            pipe.multi()
            if not raw or (only_if is not None and not only_if(record)):
                return False
            self._write_fit(pipe, fit_id, fields)
            if fields.get("status") in ("succeeded", "failed") and record.get("dedupe_key"):
                self._drop_dedupe(pipe, record["dedupe_key"], fit_id)
            return True

        return self._transact([fkey], body)

    def _drop_dedupe(self, pipe: Pipeline, dedupe_key: str, fit_id: str) -> None:
        # Lua keeps "delete only if it still points at this fit" atomic inside MULTI.
        pipe.eval("if redis.call('GET', KEYS[1]) == ARGV[1] then "
                  "return redis.call('DEL', KEYS[1]) end return 0", 1, dedupe_key, fit_id)

    def dedupe_key(self, name: str, params_hash: str) -> str:
        return self._m(name, "dedupe", params_hash)

    def dedupe_fit_id(self, dedupe_key: str) -> str | None:
        """The fit id a dedupe key points at (a queued/running fit with those params)."""
        return _s(self.redis.get(dedupe_key))

    def create_fit(self, name: str, uid: str, record: dict[str, Any],
                   enqueue: Callable[[Pipeline], None]) -> tuple[str, bool]:
        """Store a new fit and enqueue its job in one EXEC, unless the dedupe key points
        at a live fit. Returns (fit_id, created). ``record["dedupe_key"]`` is the key."""
        mkey, dkey = self._m(name), record["dedupe_key"]

        def body(pipe: Pipeline) -> tuple[str, bool]:
            if _s(pipe.hget(mkey, "uid")) != uid:
                raise NotFound(f"metric {name!r} does not exist")
            existing = _s(pipe.get(dkey))
            if existing:
                status = pipe.hget(self.key("fit", existing), "status")
                if status is not None and json.loads(status) in ("queued", "running"):
                    pipe.multi()
                    return existing, False
            pipe.multi()
            self._write_fit(pipe, record["fit_id"], record)
            pipe.zadd(self._m(name, "fits"), {record["fit_id"]: record["created_ts"]})
            pipe.set(dkey, record["fit_id"])
            enqueue(pipe)
            return record["fit_id"], True

        return self._transact([mkey, dkey], body)

    def requeue_fit(self, fit_id: str, fields: dict[str, Any],
                    enqueue: Callable[[Pipeline], None]) -> bool:
        """Reset a failed fit and enqueue a new job for it, atomically."""
        fkey = self.key("fit", fit_id)

        def body(pipe: Pipeline) -> bool:
            status = pipe.hget(fkey, "status")
            if status is None or json.loads(status) != "failed":
                pipe.multi()
                return False
            pipe.multi()
            self._write_fit(pipe, fit_id, fields)
            enqueue(pipe)
            return True

        return self._transact([fkey], body)

    def fit_ids(self, name: str | None = None) -> list[str]:
        names = [name] if name is not None else self.metric_names()
        with self.redis.pipeline(transaction=False) as pipe:
            for m in names:
                pipe.zrange(self._m(m, "fits"), 0, -1, withscores=True)
            ranges = pipe.execute()
        ids = [(s, _s(f)) for pairs in ranges for f, s in pairs]
        return [f for _, f in sorted(ids)]
