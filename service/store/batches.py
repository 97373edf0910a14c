"""Labelled batches: metadata, statistics bytes, the compressed matrix and labels.

A batch is stored by one Lua script, atomic without WATCH (concurrent producers on
one metric never retry): it checks the metric's uid and the content index, then
writes the batch hash, its place in the index, the record count and its content hash.
"""

from __future__ import annotations

import json
from typing import TYPE_CHECKING, Any

from .codecs import text, unpack_json, unpack_matrix
from .errors import DuplicateBatch, MissingMetric
from .keys import Keys
from .tx import transact

if TYPE_CHECKING:
    import redis
    from redis.client import Pipeline

# KEYS: metric, batchseq, batch, index, records, content
# ARGV: uid, batch_id, meta, stats, matrix, labels, records, sha256, allow_duplicate
_ADD = """
if redis.call('HGET', KEYS[1], 'uid') ~= ARGV[1] then return {1} end
local existing = redis.call('HGET', KEYS[6], ARGV[8])
if existing and ARGV[9] ~= '1' then return {2, existing} end
local seq = redis.call('INCR', KEYS[2])
redis.call('HSET', KEYS[3], 'meta', ARGV[3], 'stats', ARGV[4], 'matrix', ARGV[5],
           'labels', ARGV[6])
redis.call('ZADD', KEYS[4], seq, ARGV[2])
redis.call('INCRBY', KEYS[5], ARGV[7])
if not existing then redis.call('HSET', KEYS[6], ARGV[8], ARGV[2]) end
return {0}
"""


class BatchStore:
    def __init__(self, redis: redis.Redis, keys: Keys) -> None:
        self.redis, self.keys = redis, keys
        self._add = redis.register_script(_ADD)

    def add(self, name: str, uid: str, meta: dict[str, Any], stats: bytes, matrix: bytes,
            labels: bytes, *, allow_duplicate: bool = False) -> None:
        """Store one batch atomically (a statistics-only batch: empty matrix and labels).

        MissingMetric if the metric vanished or was re-created; DuplicateBatch (naming
        the stored batch) if its content hash is already stored, unless allowed.
        """
        k, batch_id = self.keys, meta["batch_id"]
        out = self._add(
            keys=[k.metric(name), k.batch_seq(), k.batch(name, batch_id), k.batch_index(name),
                  k.records(name), k.content(name)],
            args=[uid, batch_id, json.dumps(meta), stats, matrix, labels, int(meta["records"]),
                  meta["sha256"], "1" if allow_duplicate else "0"])
        code = int(out[0])
        if code == 1:
            raise MissingMetric(f"metric {name!r} does not exist")
        if code == 2:
            raise DuplicateBatch(text(out[1]))

    def ids(self, name: str) -> list[str]:
        return [text(b) for b in self.redis.zrange(self.keys.batch_index(name), 0, -1)]

    def metas(self, name: str) -> list[dict[str, Any]]:
        ids = self.ids(name)
        if not ids:
            return []
        with self.redis.pipeline(transaction=False) as pipe:
            for b in ids:
                pipe.hget(self.keys.batch(name, b), "meta")
            metas = pipe.execute()
        return [json.loads(m) for m in metas if m is not None]

    def metas_after(self, name: str, after: int | None, count: int
                    ) -> list[tuple[int, dict[str, Any]]]:
        """Up to ``count`` batches ingested after position ``after`` (their ingest
        number, the index score), oldest first, as ``(position, meta)``."""
        lo = f"({after}" if after is not None else "-inf"
        pairs = self.redis.zrangebyscore(self.keys.batch_index(name), lo, "+inf", start=0,
                                         num=count, withscores=True)
        with self.redis.pipeline(transaction=False) as pipe:
            for b, _ in pairs:
                pipe.hget(self.keys.batch(name, text(b)), "meta")
            metas = pipe.execute() if pairs else []
        return [(int(score), json.loads(m))
                for (_, score), m in zip(pairs, metas, strict=True) if m is not None]

    def meta(self, name: str, batch_id: str) -> dict[str, Any] | None:
        raw = self.redis.hget(self.keys.batch(name, batch_id), "meta")
        return json.loads(raw) if raw is not None else None

    def load(self, name: str) -> list[dict[str, Any]]:
        """All batches with ``meta``, ``stats`` (bytes), ``X`` (ndarray), ``labels`` (list);
        ``X`` and ``labels`` are None for a statistics-only batch."""
        ids = self.ids(name)
        with self.redis.pipeline(transaction=True) as pipe:  # one consistent snapshot
            for b in ids:
                pipe.hmget(self.keys.batch(name, b), ["meta", "stats", "matrix", "labels"])
            rows = pipe.execute()
        out = []
        for meta, stats, matrix, labels in rows:
            if meta is None:  # deleted between ZRANGE and the reads
                continue
            out.append({"meta": json.loads(meta), "stats": stats,  # no records: None
                        "X": unpack_matrix(matrix) if matrix else None,
                        "labels": unpack_json(labels) if labels else None})
        return out

    def load_one(self, name: str, batch_id: str) -> dict[str, Any] | None:
        """One batch with ``meta``, ``X`` (ndarray) and ``labels`` (list); None if gone."""
        meta, matrix, labels = self.redis.hmget(self.keys.batch(name, batch_id),
                                                ["meta", "matrix", "labels"])
        if meta is None:
            return None
        return {"meta": json.loads(meta), "X": unpack_matrix(matrix),
                "labels": unpack_json(labels)}

    def delete(self, name: str, batch_id: str) -> bool:
        k = self.keys
        bkey = k.batch(name, batch_id)

        def body(pipe: Pipeline) -> bool:
            raw = pipe.hget(bkey, "meta")
            if raw is None:
                pipe.multi()
                return False
            meta = json.loads(raw)
            sha = meta.get("sha256")
            owner = text(pipe.hget(k.content(name), sha)) if sha else None
            # a copy stored with allow_duplicate inherits the content entry, so a later
            # retry of the same content is still recognised once the first is gone
            heir = self._copy_of(pipe, name, sha, batch_id) if owner == batch_id else None
            pipe.multi()
            pipe.delete(bkey)
            pipe.zrem(k.batch_index(name), batch_id)
            pipe.decrby(k.records(name), int(meta["records"]))
            if heir is not None:
                pipe.hset(k.content(name), sha, heir)
            elif owner == batch_id:
                pipe.hdel(k.content(name), sha)
            return True

        # the index is watched too: a copy added meanwhile must not be missed
        return transact(self.redis, [bkey, k.content(name), k.batch_index(name)], body)

    def _copy_of(self, pipe: Pipeline, name: str, sha: str, batch_id: str) -> str | None:
        """The oldest other batch of ``name`` with content hash ``sha`` (reads while
        watching; deletes of a content owner are rare, so a scan of the metas is fine)."""
        others = [text(b) for b in pipe.zrange(self.keys.batch_index(name), 0, -1)
                  if text(b) != batch_id]
        if not others:
            return None
        with self.redis.pipeline(transaction=False) as reads:
            for b in others:
                reads.hget(self.keys.batch(name, b), "meta")
            metas = reads.execute()
        for b, raw in zip(others, metas, strict=True):
            if raw is not None and json.loads(raw).get("sha256") == sha:
                return b
        return None
