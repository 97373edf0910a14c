"""Wall-clock times as the API shows them: ISO 8601 UTC with milliseconds and a ``Z``."""

from __future__ import annotations

from datetime import datetime, timezone


def iso_utc(dt: datetime) -> str:
    """An aware time as ISO 8601 UTC with milliseconds and a ``Z``."""
    return dt.astimezone(timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def utcnow() -> str:
    """Current UTC time, ISO 8601 with milliseconds and a ``Z``."""
    return iso_utc(datetime.now(timezone.utc))
