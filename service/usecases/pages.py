"""Pages of a list: ``limit`` items and an opaque ``cursor`` for the next page.

A cursor names a position in a stable order (a metric name; a batch's ingest number;
a version number; a fit's creation time and id; a place in the activation history),
never an offset into a list that may grow, so a walk over every page yields each
item present all along exactly once, in order, while others are added. It is the
position as URL-safe base64 of JSON, tagged with the list it belongs to; a cursor
from another list, or one that does not decode, is a 422 naming ``cursor``.
"""

from __future__ import annotations

import base64
import binascii
import json
from collections.abc import Callable
from typing import Any

from service.errors import InvalidInput

DEFAULT_LIMIT = 100
MAX_LIMIT = 500
MAX_CURSOR = 512  # characters


def check_limit(limit: Any, most: int = MAX_LIMIT) -> int:
    """``limit``'s rule (the HTTP schema reads the query with it; use cases take the
    int); a list of its own may allow up to ``most`` items a page."""
    if isinstance(limit, bool) or not isinstance(limit, int) or not 1 <= limit <= most:
        raise InvalidInput.field("limit", f"a whole number from 1 to {most}")
    return limit


def encode(kind: str, position: Any) -> str:
    raw = json.dumps([kind, position], separators=(",", ":")).encode()
    return base64.urlsafe_b64encode(raw).decode().rstrip("=")


def decode(cursor: Any, kind: str, valid: Callable[[Any], bool]) -> Any:
    """The position ``cursor`` names in list ``kind`` (None for no cursor)."""
    if cursor is None:
        return None
    bad = InvalidInput.field("cursor", "a next_cursor this list answered (it is opaque)")
    if not isinstance(cursor, str) or not 0 < len(cursor) <= MAX_CURSOR:
        raise bad
    try:
        raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
        tag, position = json.loads(raw)
    except (binascii.Error, ValueError, TypeError):
        raise bad from None
    if tag != kind or not valid(position):
        raise bad
    return position


def whole(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool) and v >= 0


def page(key: str, items: list[Any], limit: int, kind: str,
         position: Any) -> dict[str, Any]:
    """The answer: ``items`` (at most ``limit``; one more means there is a next page)
    under ``key``, and the cursor after the last one shown (None at the end)."""
    more = len(items) > limit
    shown = items[:limit]
    return {key: shown, "next_cursor": encode(kind, position(shown[-1])) if more else None}
