"""Leases: a running attempt (a fit's or a grouping run's) proves it is alive.

The lease key holds the attempt's job id with a time to live; only the holder may
renew or release it. The warden reads a missing lease on a running record as an
attempt that died.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from .codecs import text

if TYPE_CHECKING:
    import redis

RENEW = ("if redis.call('GET', KEYS[1]) == ARGV[1] then "
         "return redis.call('PEXPIRE', KEYS[1], ARGV[2]) end return 0")
RELEASE = ("if redis.call('GET', KEYS[1]) == ARGV[1] then "
           "return redis.call('DEL', KEYS[1]) end return 0")


class Leases:
    """The lease members of a store whose records run attempts; the store says where
    a record's lease lives (``_lease_key``)."""

    redis: redis.Redis

    def _lease_key(self, owner: str) -> str:
        raise NotImplementedError

    def take_lease(self, owner: str, job_id: str, ttl_ms: int) -> None:
        self.redis.set(self._lease_key(owner), job_id, px=ttl_ms)

    def renew_lease(self, owner: str, job_id: str, ttl_ms: int) -> bool:
        """Extend this attempt's lease; False if it lapsed or another attempt holds it."""
        return bool(self.redis.eval(RENEW, 1, self._lease_key(owner), job_id, ttl_ms))

    def release_lease(self, owner: str, job_id: str) -> None:
        self.redis.eval(RELEASE, 1, self._lease_key(owner), job_id)

    def lease_holder(self, owner: str) -> str | None:
        """The job id whose attempt holds the lease (None once it lapsed)."""
        return text(self.redis.get(self._lease_key(owner)))


__all__ = ["RELEASE", "RENEW", "Leases"]
