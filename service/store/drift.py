"""Drift buckets (hourly summaries of grouped records) and version references.

A version's reference is written with the version itself (``VersionStore.commit``).
A bucket is one hash per metric, version and UTC hour with five fields (see
``keys.py``): the record count, the number of requests, the features' means and M2s
and every bin count, the last three as comma-separated text — and a sixth, the
missing values filled in, once a request filled any. A summary (of one
grouping request, or of several a web process merged first) is added with ONE
round trip: a Lua script (sent as EVALSHA) that merges the
moments with the pairwise update of Chan, Golub & LeVeque (1979), adds the bin
counts and renews the bucket's expiry — atomic, so concurrent requests never lose
each other's counts. Records themselves are never stored.

Memory: the text holds ``2·d`` doubles (≤ 25 characters each) and ``Σ sizes`` counts
(≤ 11 characters below 10¹⁰ records an hour); ``tests/service/test_drift_store.py``
measures the bytes with MEMORY USAGE against the bound the README states.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .codecs import text
from .keys import Keys

if TYPE_CHECKING:
    import redis

# KEYS[1] bucket; ARGV: ttl seconds, n, then comma-separated: the d means, the d M2s
# and every bin count (the histograms end to end), then the missing values filled in
# and the number of requests the summary covers. Five arguments and four fields
# whatever d is: packing many small arguments costs the client ~5 µs each and every
# redis.call a few µs on the server, while Lua arithmetic on a string is cheap.
# %.17g keeps every bit of a double (Lua's tostring keeps only 14 digits).
_ADD = """
local function split(s)
  local t = {}
  for v in string.gmatch(s or '', '[^,]+') do t[#t + 1] = tonumber(v) end
  return t
end
local key = KEYS[1]
local nb = tonumber(ARGV[2])
local old = redis.call('HMGET', key, 'n', 'mean', 'm2', 'counts')
local na = tonumber(old[1] or '0')
local mean, m2, counts = ARGV[3], ARGV[4], ARGV[5]
if na > 0 then
  local ma, qa, ca = split(old[2]), split(old[3]), split(old[4])
  local mb, qb, cb = split(ARGV[3]), split(ARGV[4]), split(ARGV[5])
  if #ma ~= #mb or #ca ~= #cb then
    return redis.error_reply('drift bucket of another layout')
  end
  local n = na + nb
  local w = nb / n
  local c = na * nb / n
  for j = 1, #ma do
    local delta = mb[j] - ma[j]
    qa[j] = string.format('%.17g', qa[j] + qb[j] + delta * delta * c)
    ma[j] = string.format('%.17g', ma[j] + delta * w)
  end
  for i = 1, #ca do ca[i] = string.format('%d', ca[i] + cb[i]) end
  mean, m2, counts = table.concat(ma, ','), table.concat(qa, ','), table.concat(ca, ',')
end
redis.call('HSET', key, 'n', string.format('%d', na + nb), 'mean', mean, 'm2', m2,
           'counts', counts)
redis.call('HINCRBY', key, 'requests', tonumber(ARGV[7] or '1'))
if tonumber(ARGV[6] or '0') > 0 then redis.call('HINCRBY', key, 'imputed', ARGV[6]) end
redis.call('EXPIRE', key, ARGV[1])
return na + nb
"""


@dataclass(frozen=True, eq=False)
class Bucket:
    """One hour's summary as stored: moments and bin counts by histogram name."""

    hour: int
    requests: int
    count: int
    mean: np.ndarray
    m2: np.ndarray
    counts: dict[str, np.ndarray]
    imputed: int = 0  # missing values the requests filled in


class DriftStore:
    def __init__(self, redis: redis.Redis, keys: Keys) -> None:
        self.redis, self.keys = redis, keys
        self._add = redis.register_script(_ADD)

    def add(self, name: str, uid: str, version: int, hour: int, ttl_seconds: int,
            count: int, mean: np.ndarray, m2: np.ndarray, counts: dict[str, np.ndarray],
            imputed: int = 0, requests: int = 1) -> None:
        """Merge a summary of ``requests`` requests into its hour's bucket (one round
        trip).

        ``counts`` maps a histogram's name to its bin counts (any shape, stored flat,
        end to end in the order given; read back with the same order and sizes).
        """
        flat = np.concatenate([np.asarray(a, dtype=np.int64).ravel() for a in counts.values()])
        args = [int(ttl_seconds), int(count), ",".join(map(repr, np.asarray(mean, float).tolist())),
                ",".join(map(repr, np.asarray(m2, float).tolist())),
                ",".join(map(str, flat.tolist())), int(imputed), int(requests)]
        self._add(keys=[self.keys.drift_bucket(name, uid, version, hour)], args=args)

    def buckets(self, name: str, uid: str, version: int, hours: list[int],
                sizes: dict[str, int]) -> list[Bucket]:
        """The stored buckets among ``hours`` (one round trip), oldest first;
        ``sizes`` gives each histogram's flat length."""
        with self.redis.pipeline(transaction=False) as pipe:
            for h in hours:
                pipe.hgetall(self.keys.drift_bucket(name, uid, version, h))
            raws = pipe.execute()
        return [_decode(h, raw, sizes) for h, raw in zip(hours, raws, strict=True) if raw]

    def reference(self, name: str, n: int) -> bytes | None:
        return self.redis.get(self.keys.drift_reference(name, n))


def _floats(raw: str | None) -> np.ndarray:
    return np.array([float(v) for v in raw.split(",")]) if raw else np.zeros(0)


def _decode(hour: int, raw: dict[bytes, bytes], sizes: dict[str, int]) -> Bucket:
    f = {text(k): text(v) for k, v in raw.items()}
    flat = np.array(f["counts"].split(","), dtype=np.int64) if f.get("counts") else None
    if flat is None or flat.size != sum(sizes.values()):
        flat = np.zeros(sum(sizes.values()), dtype=np.int64)
    cuts = np.cumsum(list(sizes.values()))[:-1]
    counts = dict(zip(sizes, np.split(flat, cuts), strict=True))
    return Bucket(hour, int(f.get("requests", 0)), int(f.get("n", 0)), _floats(f.get("mean")),
                  _floats(f.get("m2")), counts, int(f.get("imputed", 0)))


__all__ = ["Bucket", "DriftStore"]
