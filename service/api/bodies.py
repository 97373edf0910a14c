"""Request bodies: bounded before they are read, parsed once, duplicate keys refused.

- Every body has a size limit: ``LIKEWISE_MAX_REQUEST_BYTES`` for batches and
  groupings, :data:`SMALL_BODY` for the small envelopes (metric definitions, fit
  requests, activations) and ``LIKEWISE_MAX_RUN_REQUEST_BYTES`` for a grouping run's
  table, so validation cost follows what a route allows, not what a caller sends.
- A body that declares a length over its limit is a 413 before any of it is read; a
  chunked body (no ``Content-Length``) is read up to the limit plus one byte, and
  over it is a 413 too (the WSGI layer would otherwise cut it silently at the
  limit).
- :func:`body` reads the body once, when the view first asks (after the token
  check), and keeps it for the request (the table readers, the schema loader and the
  idempotency digest share it). In process it is one call on the WSGI stream:
  werkzeug's own reader copies a body in 64 KiB steps and then once more (about 60 ms
  on a 41 MB grouping, measured).
- Under the web server a body has a deadline (:mod:`service.deadlines`): it must
  arrive within ``LIKEWISE_CLIENT_SECONDS`` plus its length at
  ``LIKEWISE_CLIENT_MIN_RATE`` bytes a second, checked every 1 MiB as it arrives. A
  client that falls behind gets a 408 and the process moves on; the work after the
  body has no deadline.
- :func:`parse_json` refuses an object with the same key twice (a 422 naming the
  record, or the body), instead of letting the last value win. A body that orjson
  provably reads the same way, without a duplicate, skips the strict parse
  (``service.api.jsonio.decode_exact``).
"""

from __future__ import annotations

import io
import json
import time
from typing import Any

from flask import g, request
from werkzeug.exceptions import ClientDisconnected, RequestEntityTooLarge, RequestTimeout

from service import deadlines
from service.errors import InvalidInput

from .jsonio import UNSURE, decode_exact

SMALL_BODY = 1024 * 1024
DRAIN_BYTES = 64 * 1024
# endpoints whose bodies are small envelopes (the largest: 1,000 feature names of
# up to 128 characters, each character escaped as \uXXXX, is about 0.8 MiB)
SMALL_ENDPOINTS = frozenset({
    "v1.metrics.put_metric", "v1.versions.activate", "v1.fits.request_fit",
    "v1.fits.retry_fit",
})
# endpoints that take a large table: LIKEWISE_MAX_RUN_REQUEST_BYTES instead
LARGE_ENDPOINTS = frozenset({"v1.grouping_runs.start_run"})


STEP_BYTES = 1024 * 1024  # under a deadline a body is read in steps of this size


def bound_body() -> None:
    """``before_request``: the route's body limit. A body declared over it is a 413
    at once; any other is read when the view asks for it (:func:`body`), once the
    token has been checked."""
    limit = request.max_content_length
    if request.endpoint in LARGE_ENDPOINTS:
        from .deps import context

        limit = context().settings.max_run_request_bytes
        request.max_content_length = limit
    if request.endpoint in SMALL_ENDPOINTS:
        limit = SMALL_BODY if limit is None else min(limit, SMALL_BODY)
        request.max_content_length = limit
    deadline = deadlines.of(request.environ)
    if deadline is not None:
        deadline.pause()  # the head has arrived; a body is timed as it is read
    declared = _declared()
    if declared is not None and limit is not None and declared > limit:
        _drain()
        raise RequestEntityTooLarge()


def _declared() -> int | None:
    """The body's declared length (None: chunked, or no body), from the environ:
    ``request.content_length`` would be kept before :func:`_read_body` rewrites it."""
    raw = request.environ.get("CONTENT_LENGTH", "")
    return int(raw) if raw.isdigit() else None


def _chunked() -> bool:
    """A body without a declared length, ended by the stream: a server that de-chunks
    marks it terminated (gunicorn marks every request so)."""
    env = request.environ
    return bool(env.get("wsgi.input_terminated")) or (
        "chunked" in env.get("HTTP_TRANSFER_ENCODING", "").lower())


def body() -> bytes:
    """The request's body (``b""`` when it has none), read on first use within the
    route's limit (a 413 over it) and kept for the rest of the request; a client that
    sends less than its ``Content-Length`` gets a 400, one too slow a 408."""
    kept = g.get("likewise_body")
    if kept is None:
        kept = g.likewise_body = _read_body()
    return kept


def _read_body() -> bytes:
    env = request.environ
    limit = request.max_content_length
    declared = _declared()
    if declared is None and not _chunked():
        return b""
    if declared is not None:
        data = _read_timed(declared)
        if len(data) < declared:
            _expired()
            raise ClientDisconnected()
    else:
        # a chunked body: read up to the limit, plus one byte to tell it is over
        data = _read_timed(limit + 1 if limit is not None else None)
        _expired()  # a chunked body cut off by its deadline reads as a shorter one
        if limit is not None and len(data) > limit:
            _drain()
            raise RequestEntityTooLarge()
    deadline = deadlines.of(env)
    if deadline is not None:
        deadline.pause()  # the work that follows has no deadline
    # anything that still reads the stream (werkzeug's get_data) finds the same bytes,
    # as a body of known length
    env["wsgi.input"] = io.BytesIO(data)
    env["CONTENT_LENGTH"] = str(len(data))
    env.pop("wsgi.input_terminated", None)
    env.pop("HTTP_TRANSFER_ENCODING", None)
    return data


def _read_timed(want: int | None) -> bytes:
    """Up to ``want`` bytes of the body (None: all), fewer when the stream ends.

    Under a deadline, in steps of :data:`STEP_BYTES`: the bytes up to the end of each
    step are due within ``LIKEWISE_CLIENT_SECONDS`` of the first read plus their
    count at ``LIKEWISE_CLIENT_MIN_RATE``, so the rate holds as the body arrives (a
    chunked body is timed by what it sends, not by the route's limit). Without one
    (in process), in one call: a whole BytesIO comes back without a copy.
    """
    stream = request.environ["wsgi.input"]
    deadline = deadlines.of(request.environ)
    step = STEP_BYTES if deadline is not None or want is None else want
    begun = time.monotonic()
    parts: list[bytes] = []
    got = 0
    while want is None or got < want:
        size = step if want is None else min(step, want - got)
        if deadline is not None:
            deadline.allow(got + size, "body", since=begun)
        part = _read(stream, size)
        if not part or (deadline is not None and deadline.expired):
            break  # the stream ended, or the deadline shut it
        parts.append(part)
        got += len(part)
    return parts[0] if len(parts) == 1 else b"".join(parts)


def _read(stream: Any, size: int) -> bytes:
    try:
        return stream.read(size)
    except OSError:  # the connection failed, or its deadline shut it
        _expired()
        raise ClientDisconnected() from None


def _drain() -> None:
    """Read a little of a body over the limit (bounded, and timed) so one just over it
    is consumed and the connection closes cleanly: the 413 reaches the client instead
    of a reset."""
    deadline = deadlines.of(request.environ)
    if deadline is not None:
        deadline.allow(DRAIN_BYTES, "body")
    try:
        request.environ["wsgi.input"].read(DRAIN_BYTES)
    except OSError:
        pass


def _expired() -> None:
    deadline = deadlines.of(request.environ)
    if deadline is not None and deadline.expired:
        raise RequestTimeout("The request body did not arrive in time "
                             "(LIKEWISE_CLIENT_SECONDS, LIKEWISE_CLIENT_MIN_RATE).")


class _Duplicate(Exception):
    def __init__(self, key: str, index: int, keys: list[str]) -> None:
        self.key, self.index, self.keys = key, index, keys


def parse_json(raw: bytes, envelope: frozenset[str]) -> Any:
    """``json.loads`` that refuses duplicate keys; InvalidInput names where.

    Objects are completed inner first, so in a records body the i-th object parsed
    is ``records[i]``; an object whose keys are all envelope keys is the body itself.
    Most bodies take orjson's parse instead, when it provably gives the same value.
    """
    fast = decode_exact(raw)
    if fast is not UNSURE:
        return fast
    seen = 0

    def unique(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
        nonlocal seen
        obj = dict(pairs)
        if len(obj) != len(pairs):
            names = [k for k, _ in pairs]
            dup = next(k for i, k in enumerate(names) if k in names[:i])
            raise _Duplicate(dup, seen, names)
        seen += 1
        return obj

    try:
        return json.loads(raw, object_pairs_hook=unique)
    except _Duplicate as exc:
        where = "body" if set(exc.keys) <= envelope else f"records[{exc.index}]"
        raise InvalidInput.field(
            where, f"the key {exc.key!r} appears more than once",
            f"{where}: the key {exc.key!r} appears more than once") from None
