"""Drift buckets (hourly summaries of grouped records) and version references.

A version's reference is written with the version itself (``VersionStore.commit``).
A bucket is one hash per metric, version and UTC hour: the record count, the number
of requests, each feature's mean and M2, and bin counts (see ``keys.py``). A grouping
request adds its summary with ONE round trip: a Lua script (sent as EVALSHA) that
merges the moments with the pairwise update of Chan, Golub & LeVeque (1979), adds
the bin counts and renews the bucket's expiry — atomic, so concurrent requests never
lose each other's counts. Records themselves are never stored.

Memory: a bucket holds at most ``2 + 2·d + Σ sizes`` fields (``d`` features, every
bin count once it is non-zero); :func:`bucket_fields` gives the number, and
``tests/service/test_drift_store.py`` measures the bytes with MEMORY USAGE.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .codecs import text
from .keys import Keys

if TYPE_CHECKING:
    import redis

# KEYS[1] bucket; ARGV: ttl seconds, n, d, d means, d M2s, then (field, count) pairs.
# %.17g keeps every bit of a double (Lua's tostring keeps only 14 digits).
_ADD = """
local key = KEYS[1]
local nb = tonumber(ARGV[2])
local d = tonumber(ARGV[3])
local na = tonumber(redis.call('HGET', key, 'n') or '0')
local n = na + nb
if nb > 0 then
  for j = 0, d - 1 do
    local mk, qk = 'mean:' .. j, 'm2:' .. j
    local mb, qb = tonumber(ARGV[4 + j]), tonumber(ARGV[4 + d + j])
    local ma = tonumber(redis.call('HGET', key, mk) or '0')
    local qa = tonumber(redis.call('HGET', key, qk) or '0')
    local delta = mb - ma
    redis.call('HSET', key, mk, string.format('%.17g', ma + delta * nb / n),
               qk, string.format('%.17g', qa + qb + delta * delta * (na * nb / n)))
  end
end
redis.call('HSET', key, 'n', string.format('%d', n))
redis.call('HINCRBY', key, 'requests', 1)
for i = 4 + 2 * d, #ARGV, 2 do
  redis.call('HINCRBY', key, ARGV[i], ARGV[i + 1])
end
redis.call('EXPIRE', key, ARGV[1])
return n
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


def bucket_fields(n_features: int, sizes: dict[str, int]) -> int:
    """The most fields a bucket can hold (``sizes``: flat bin counts per histogram)."""
    return 2 + 2 * n_features + sum(sizes.values())


class DriftStore:
    def __init__(self, redis: redis.Redis, keys: Keys) -> None:
        self.redis, self.keys = redis, keys
        self._add = redis.register_script(_ADD)

    def add(self, name: str, uid: str, version: int, hour: int, ttl_seconds: int,
            count: int, mean: np.ndarray, m2: np.ndarray, counts: dict[str, np.ndarray]
            ) -> None:
        """Merge one request's summary into its hour's bucket (one round trip).

        ``counts`` maps a histogram's one-letter name to its bin counts (any shape,
        stored flat); only non-zero bins are sent.
        """
        args: list[object] = [int(ttl_seconds), int(count), len(mean)]
        args += [repr(float(v)) for v in mean] + [repr(float(v)) for v in m2]
        for prefix, arr in counts.items():
            flat = np.asarray(arr, dtype=np.int64).ravel()
            for b in np.flatnonzero(flat):
                args += [f"{prefix}:{b}", int(flat[b])]
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


def _decode(hour: int, raw: dict[bytes, bytes], sizes: dict[str, int]) -> Bucket:
    fields = {text(k): text(v) for k, v in raw.items()}
    d = sum(1 for f in fields if f.startswith("mean:"))
    counts = {p: np.zeros(size, dtype=np.int64) for p, size in sizes.items()}
    for f, v in fields.items():
        prefix, sep, index = f.partition(":")
        if sep and prefix in counts and int(index) < counts[prefix].size:
            counts[prefix][int(index)] = int(v)
    return Bucket(hour, int(fields.get("requests", 0)), int(fields.get("n", 0)),
                  np.array([float(fields[f"mean:{j}"]) for j in range(d)]),
                  np.array([float(fields[f"m2:{j}"]) for j in range(d)]), counts)


__all__ = ["Bucket", "DriftStore", "bucket_fields"]
