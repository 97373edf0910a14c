"""Request ids and the log line of each request.

Every response carries ``X-Request-Id``: the caller's own id when it sent a well
formed one (1–64 letters, digits, ``.``, ``_``, ``:`` or ``-``, starting with a letter
or digit), else a new one (32 hex digits). Problem bodies repeat it
(``request_id``), and every log line written while the request runs carries it
(:class:`service.logs.RequestContext`).

When the response leaves, one line is logged (logger ``likewise.http``) with the
method, route (the URL rule, never the query), status, duration, and the metric, fit
and principal the request named. Tokens, bodies and record values are never logged.
"""

from __future__ import annotations

import logging
import re
import time
import uuid

from flask import Flask, Response, g, request

HEADER = "X-Request-Id"
CALLER_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9._:-]{0,63}")
LONGEST = 100  # characters of a name taken from the path into a log line
_FIT_LOCATION = re.compile(r"/v1/fits/([0-9a-f]{20})")

log = logging.getLogger("likewise.http")


def request_id() -> str | None:
    """The current request's id (None outside a request, or before it was given one)."""
    return g.get("request_id")


def _assign() -> None:
    given = request.headers.get(HEADER, "")
    g.request_id = given if CALLER_ID.fullmatch(given) else uuid.uuid4().hex
    g.likewise_t0 = time.perf_counter()


def _fields(response: Response) -> dict[str, object]:
    args = request.view_args or {}
    fields: dict[str, object] = {
        "request_id": g.get("request_id"),
        "method": request.method,
        "route": request.url_rule.rule if request.url_rule is not None else "<unmatched>",
        "status": response.status_code,
    }
    started = g.get("likewise_t0")
    if started is not None:
        fields["duration_ms"] = round((time.perf_counter() - started) * 1000, 3)
    if "name" in args:
        fields["metric"] = str(args["name"])[:LONGEST]
    fit = str(args["fit_id"])[:LONGEST] if "fit_id" in args else None
    if fit is None:  # a new fit is named by the answer's Location
        found = _FIT_LOCATION.fullmatch(response.headers.get("Location", ""))
        fit = found.group(1) if found else None
    if fit is not None:
        fields["fit_id"] = fit
    who = g.get("principal")
    if who is not None:
        fields["principal"] = who.name
    return fields


def _finish(response: Response) -> Response:
    rid = g.get("request_id")
    if rid is not None:
        response.headers[HEADER] = rid
    fields = _fields(response)
    log.info("%s %s %s", fields["method"], fields["route"], fields["status"], extra=fields)
    return response


def install(app: Flask) -> None:
    """Give every request an id; call before any other hook that may refuse a request."""
    app.before_request(_assign)
    app.after_request(_finish)
