"""Request bodies: bounded before they are read, parsed once, duplicate keys refused.

- Every body has a size limit: ``LIKEWISE_MAX_REQUEST_BYTES`` for batches and
  groupings, :data:`SMALL_BODY` for the small envelopes (metric definitions, fit
  requests, activations) and ``LIKEWISE_MAX_RUN_REQUEST_BYTES`` for a grouping run's
  table, so validation cost follows what a route allows, not
  what a caller sends.
- A chunked body (no ``Content-Length``) is read up to the limit plus one byte in
  :func:`bound_body`: over the limit it is a 413, like a body that declares its
  length; the WSGI layer would otherwise cut it silently at the limit.
- :func:`body` reads the body once, in one call on the WSGI stream, and keeps it for
  the request (the table readers, the schema loader and the idempotency digest share
  it): werkzeug's own reader copies a body in 64 KiB steps and then once more (about
  60 ms on a 41 MB grouping, measured).
- Under the web server a body has a deadline (:mod:`service.deadlines`): the
  ``LIKEWISE_CLIENT_SECONDS`` plus its length (a chunked one: the route's limit) at
  ``LIKEWISE_CLIENT_MIN_RATE`` bytes a second. A client that has not sent it by then
  gets a 408 and the process moves on; the work after the body has no deadline.
- :func:`parse_json` refuses an object with the same key twice (a 422 naming the
  record, or the body), instead of letting the last value win. A body that orjson
  provably reads the same way, without a duplicate, skips the strict parse
  (``service.api.jsonio.decode_exact``).
"""

from __future__ import annotations

import io
import json
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


def bound_body() -> None:
    """``before_request``: the route's body limit; chunked bodies read within it."""
    limit = request.max_content_length
    if request.endpoint in LARGE_ENDPOINTS:
        from .deps import context

        limit = context().settings.max_run_request_bytes
        request.max_content_length = limit
    if request.endpoint in SMALL_ENDPOINTS:
        limit = SMALL_BODY if limit is None else min(limit, SMALL_BODY)
        request.max_content_length = limit
    env = request.environ
    # a server that de-chunks marks the stream as terminated; werkzeug then reads it
    # up to the limit and stops there, without a word
    unbounded = env.get("wsgi.input_terminated") or (
        "chunked" in env.get("HTTP_TRANSFER_ENCODING", "").lower()
        and not env.get("CONTENT_LENGTH"))
    # from the environ: request.content_length would be read (and kept) too early
    declared = env.get("CONTENT_LENGTH", "")
    _time_body(int(declared) if declared.isdigit() else (limit or 0) if unbounded else 0)
    if limit is None or not unbounded:
        return
    data = _read(env["wsgi.input"], limit + 1)
    _expired()  # a chunked body cut off by its deadline reads as a shorter one
    _body_read()
    if len(data) > limit:
        # read a little more (bounded) so a body just over the limit is consumed and the
        # connection closes cleanly, the 413 reaching the client instead of a reset
        env["wsgi.input"].read(DRAIN_BYTES)
        raise RequestEntityTooLarge()
    env["wsgi.input"] = io.BytesIO(data)
    env["CONTENT_LENGTH"] = str(len(data))  # from here on a body of known length
    env.pop("wsgi.input_terminated", None)
    env.pop("HTTP_TRANSFER_ENCODING", None)


def body() -> bytes:
    """The request's body (``b""`` when it has none), read on first use within the
    route's limit (a 413 over it) and kept for the rest of the request; a client that
    sends less than its ``Content-Length`` gets werkzeug's 400."""
    kept = g.get("likewise_body")
    if kept is None:
        kept = g.likewise_body = _read_body()
    return kept


def _read_body() -> bytes:
    env = request.environ
    length = request.content_length  # bound_body gave a chunked body its length
    if not length:
        return b""
    limit = request.max_content_length
    if limit is not None and length > limit:
        raise RequestEntityTooLarge()
    stream = env["wsgi.input"]
    data = _read(stream, length)  # a whole BytesIO is handed back without a copy
    if len(data) < length:  # a stream may answer in parts: gather the rest
        parts, got = [data], len(data)
        while got < length:
            part = _read(stream, length - got)
            if not part:
                _expired()
                raise ClientDisconnected()
            parts.append(part)
            got += len(part)
        data = b"".join(parts)
    _body_read()
    # anything that still reads the stream (werkzeug's get_data) finds the same bytes
    env["wsgi.input"] = io.BytesIO(data)
    return data


def _read(stream: Any, size: int) -> bytes:
    try:
        return stream.read(size)
    except OSError:  # the connection failed, or its deadline shut it
        _expired()
        raise ClientDisconnected() from None


def _time_body(expected: int) -> None:
    """The body's deadline (none when the request has no body)."""
    deadline = deadlines.of(request.environ)
    if deadline is None:
        return
    if not expected:
        deadline.pause()
        return
    from .deps import context

    s = context().settings
    deadline.start(s.client_seconds + expected / s.client_min_rate)


def _body_read() -> None:
    deadline = deadlines.of(request.environ)
    if deadline is not None:
        deadline.pause()  # the work that follows has no deadline


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
