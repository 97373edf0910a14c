"""``Idempotency-Key`` on the routes that create or change something.

A caller that may resend a request (a timeout, a retried ETL task) sends a key of its
own choosing with it. The first request with a key runs; its successful answer is kept
for ``Settings.idempotency_hours``. Within that time:

- the same key with the same request (method, path, query and body) replays the first
  answer — same status, same body, same ``Location`` — with
  ``Answer-Replayed: true``, and changes nothing;
- the same key with a different request is a 422 problem naming the header;
- the same key while the first request still runs is a 409 problem (retry shortly;
  a first request cut off mid-way holds its key for at most ``CLAIM_SECONDS``).

Keys are scoped to the caller's token principal and the metric named in the path, so
two callers (or two metrics) never share an answer. A request that fails (any 4xx or
5xx) keeps nothing: resending it with the same key runs it again.
"""

from __future__ import annotations

import functools
import hashlib
import re
from collections.abc import Callable
from typing import Any

from flask import Response, json, request

from service.errors import Conflict, InvalidInput

from .auth import principal
from .bodies import body
from .deps import context

HEADER = "Idempotency-Key"
KEY_RE = re.compile(r"[\x21-\x7e]{1,255}")  # printable ASCII, no spaces
# how long a running first request holds its key (longer than any request may take:
# the web tier's worker timeout); a request cut off mid-way frees it after this
CLAIM_SECONDS = 300


def _digest(*parts: str) -> str:
    h = hashlib.sha256()
    for part in parts:
        h.update(part.encode("utf-8", "surrogateescape"))
        h.update(b"\x00")
    return h.hexdigest()


def fingerprint(method: str, path: str, query: bytes, body: bytes) -> str:
    """What makes two requests the same request: method, path, query and body bytes."""
    h = hashlib.sha256()
    h.update(f"{method} {path}?".encode())
    h.update(query)
    h.update(b"\x00")
    h.update(body)
    return h.hexdigest()


def slot(principal_name: str, metric: str, key: str) -> str:
    """The digest naming a key's slot: a key is scoped to the principal and the metric."""
    return _digest(principal_name, metric, key)


def _replay(status: int, body: Any, location: str | None) -> Response:
    resp = Response(json.dumps(body), status=status, mimetype="application/json")
    if location:
        resp.headers["Location"] = location
    resp.headers["Answer-Replayed"] = "true"
    return resp


def idempotent(view: Callable[..., Response]) -> Callable[..., Response]:
    """Decorate a view so that an ``Idempotency-Key`` makes resending it safe."""

    @functools.wraps(view)
    def wrapper(*args: Any, **kwargs: Any) -> Response:
        key = request.headers.get(HEADER)
        if key is None:
            return view(*args, **kwargs)
        if not KEY_RE.fullmatch(key):
            raise InvalidInput.field(HEADER, "1 to 255 printable ASCII characters, no spaces")
        ctx = context()
        store = ctx.storage.idempotency
        digest = slot(principal(), str((request.view_args or {}).get("name", "")), key)
        asked = fingerprint(request.method, request.path, request.query_string,
                            body())
        held = store.claim(digest, asked, CLAIM_SECONDS)
        if held is not None:
            if held.request != asked:
                raise InvalidInput.field(
                    HEADER, "this key was used with a different request",
                    "The Idempotency-Key was already used with a different request; "
                    "use a new key for a new request.")
            if held.state != "done":
                raise Conflict("A request with this Idempotency-Key is still being "
                               "handled; send it again shortly.")
            return _replay(int(held.status or 200), held.body, held.location)
        try:
            resp = view(*args, **kwargs)
        except BaseException:
            store.release(digest, asked)
            raise
        if 200 <= resp.status_code < 300:
            store.fill(digest, asked, resp.status_code, resp.get_json(),
                       resp.headers.get("Location"), ctx.settings.idempotency_hours * 3600)
        else:
            store.release(digest, asked)
        return resp

    return wrapper
