"""Drift buckets in Redis: the Lua merge of moments, bin counts, expiry, memory.

Data: wine (Forina et al.), as bundled with scikit-learn.
"""

from __future__ import annotations

import numpy as np
from numpy.testing import assert_allclose

from service.context import Context
from service.core.drift import Moments
from tests.datasets import load_open


def test_buckets_merge_moments_like_numpy_and_add_counts(ctx: Context) -> None:
    X, _ = load_open("wine")
    store, ttl = ctx.storage.drift, 3 * 3600
    parts = np.split(X + 1e4, [17, 60, 61])  # unequal parts, one of a single record
    for i, part in enumerate(parts):
        m = Moments.of(part)
        store.add("m", "u1", 1, 100, ttl, m.count, m.mean, m.m2,
                  {"f": np.array([[i, 0], [1, 2]]), "m": np.array([0, 0, 5]),
                   "d": np.zeros(2)})
    store.add("m", "u1", 1, 101, ttl, 1, X[0], np.zeros(X.shape[1]),
              {"f": np.ones((2, 2)), "m": np.zeros(3), "d": np.ones(2)})
    sizes = {"f": 4, "m": 3, "d": 2}
    got = store.buckets("m", "u1", 1, [99, 100, 101], sizes)
    assert [b.hour for b in got] == [100, 101]
    b = got[0]
    assert b.requests == 4 and b.count == len(X)
    # the Lua merge (Chan, Golub & LeVeque 1979) against numpy on the stacked records
    assert_allclose(b.mean, (X + 1e4).mean(axis=0), rtol=1e-13)
    assert_allclose(b.m2 / b.count, X.var(axis=0), rtol=1e-8)
    assert b.counts["f"].tolist() == [6, 0, 4, 8] and b.counts["m"].tolist() == [0, 0, 20]
    assert b.counts["d"].tolist() == [0, 0]
    assert store.buckets("m", "u2", 1, [100], sizes) == []  # another incarnation
    key = ctx.storage.keys.drift_bucket("m", "u1", 1, 100)
    assert 0 < ctx.redis.ttl(key) <= ttl


def test_a_full_bucket_stays_within_the_stated_memory_bound(ctx: Context) -> None:
    """README, "Watching for drift": a bucket of d features takes at most
    ``250·d + 2048`` bytes (measured with MEMORY USAGE; our bound)."""
    for d in (4, 13, 100, 1000):
        sizes = {"f": d * 14, "m": 22, "d": 22, "g": 18}
        # every count at 10 digits, every double at full length: the longest text
        counts = {p: np.full(n, 9_999_999_999) for p, n in sizes.items()}
        mean, m2 = -np.pi * np.logspace(-300, 300, d), np.pi * np.logspace(-300, 300, d)
        for _ in range(2):  # the second write goes through the merge
            ctx.storage.drift.add("m", "u", 1, d, 3600, 10, mean, m2, counts)
        key = ctx.storage.keys.drift_bucket("m", "u", 1, d)
        assert ctx.redis.hlen(key) == 5
        used = ctx.redis.memory_usage(key, samples=0)
        assert used <= 250 * d + 2048, (d, used)
