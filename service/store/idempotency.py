"""Stored answers to requests sent with an ``Idempotency-Key``.

One key holds one answer: the hash of the request it answered, its status and body.
A slot is first *claimed* (a placeholder, so two concurrent sends of one key cannot
both run), then *filled* with the answer, or *released* when the request failed so a
retry runs it again. Every slot expires: a claim soon (a request cut off mid-way
leaves no slot blocked for long), an answer after the time the caller keeps answers.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from .keys import Keys

if TYPE_CHECKING:
    import redis

_PENDING = "pending"
# fill only a slot still claimed by this request hash (a slot that expired meanwhile
# is not re-created by a late answer)
_FILL = ("local v = redis.call('GET', KEYS[1]) "
         "if not v then return 0 end "
         "if cjson.decode(v)['request'] ~= ARGV[1] then return 0 end "
         "redis.call('SET', KEYS[1], ARGV[2], 'EX', ARGV[3]) return 1")
_RELEASE = ("local v = redis.call('GET', KEYS[1]) "
            "if v and cjson.decode(v)['state'] == 'pending' and "
            "cjson.decode(v)['request'] == ARGV[1] then "
            "return redis.call('DEL', KEYS[1]) end return 0")


@dataclass(frozen=True)
class StoredAnswer:
    request: str  # hash of the request body and route it answered
    state: str  # "pending" while the first request runs, else "done"
    status: int | None = None
    body: Any = None
    location: str | None = None


class IdempotencyStore:
    def __init__(self, redis: redis.Redis, keys: Keys) -> None:
        self.redis, self.keys = redis, keys
        self._fill = redis.register_script(_FILL)
        self._release = redis.register_script(_RELEASE)

    def claim(self, digest: str, request: str, ttl_seconds: int) -> StoredAnswer | None:
        """Claim the slot for ``request`` for ``ttl_seconds``; None if claimed now, else
        what it holds."""
        key = self.keys.idempotency(digest)
        placeholder = json.dumps({"request": request, "state": _PENDING})
        if self.redis.set(key, placeholder, nx=True, ex=ttl_seconds):
            return None
        raw = self.redis.get(key)
        if raw is None:  # expired between the two calls: claim again
            return self.claim(digest, request, ttl_seconds)
        d = json.loads(raw)
        return StoredAnswer(d["request"], d["state"], d.get("status"), d.get("body"),
                            d.get("location"))

    def fill(self, digest: str, request: str, status: int, body: Any,
             location: str | None, ttl_seconds: int) -> None:
        """Keep the answer to a claimed request for ``ttl_seconds``."""
        answer = json.dumps({"request": request, "state": "done", "status": status,
                             "body": body, "location": location})
        self._fill(keys=[self.keys.idempotency(digest)], args=[request, answer, ttl_seconds])

    def release(self, digest: str, request: str) -> None:
        self._release(keys=[self.keys.idempotency(digest)], args=[request])
