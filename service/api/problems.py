"""RFC 9457 problem details: the one error shape of the whole HTTP API.

Every error leaves the app as ``application/problem+json`` — service errors, marshmallow
validation errors, Werkzeug HTTP errors (404, 405, 413 …) and unexpected exceptions
(a 500 whose body never carries a stack trace). Each body carries the request's id
(``request_id``, as in the ``X-Request-Id`` header).
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from typing import Any

from flask import Flask, Response, g, json, request
from marshmallow import ValidationError
from redis.exceptions import ConnectionError as RedisConnectionError
from redis.exceptions import OutOfMemoryError as RedisOutOfMemoryError
from redis.exceptions import ReadOnlyError as RedisReadOnlyError
from redis.exceptions import ResponseError as RedisResponseError
from redis.exceptions import TimeoutError as RedisTimeoutError
from werkzeug.exceptions import HTTPException, MethodNotAllowed

from service.errors import PROBLEM_BASE, Conflict, NotFound, ServiceError
from service.store import DuplicateBatch, MissingMetric, MissingVersion, StoreError

PROBLEM_MIME = "application/problem+json"

log = logging.getLogger(__name__)


def problem_response(
    status: int,
    title: str,
    detail: str,
    slug: str | None = None,
    errors: list[dict[str, str]] | None = None,
    headers: Mapping[str, str] | None = None,
    extra: Mapping[str, Any] | None = None,
) -> Response:
    """Build a problem+json response; ``slug`` None gives ``about:blank``.

    ``extra`` adds extension members (RFC 9457 §3.2), e.g. the checks behind a 503.
    """
    body: dict[str, Any] = {
        "type": PROBLEM_BASE + slug if slug else "about:blank",
        "title": title,
        "status": status,
        "detail": detail,
        "instance": request.path,
    }
    if errors:
        body["errors"] = errors
    body.update(extra or {})
    return _respond(body, headers)


def _respond(body: dict[str, Any], headers: Mapping[str, str] | None) -> Response:
    rid = g.get("request_id")
    if rid is not None:
        body.setdefault("request_id", rid)
    resp = Response(json.dumps(body), status=body["status"], mimetype=PROBLEM_MIME)
    for key, value in (headers or {}).items():
        resp.headers[key] = value
    return resp


def flatten_messages(messages: Any, prefix: str = "") -> list[dict[str, str]]:
    """Turn marshmallow's nested messages into ``[{"field", "message"}]``.

    ``{"features": {0: ["Not a valid string."]}}`` → ``features[0]``; schema-level
    messages (``_schema``) are reported on the body itself, field ``""`` → ``"body"``.
    """
    out: list[dict[str, str]] = []
    if isinstance(messages, Mapping):
        for key, value in messages.items():
            if key == "_schema":
                name = prefix or "body"
            elif isinstance(key, int):
                name = f"{prefix}[{key}]"
            else:
                name = f"{prefix}.{key}" if prefix else str(key)
            out.extend(flatten_messages(value, name))
    elif isinstance(messages, (list, tuple)):
        for item in messages:
            if isinstance(item, (Mapping, list, tuple)):
                out.extend(flatten_messages(item, prefix))
            else:
                out.append({"field": prefix or "body", "message": str(item)})
    else:
        out.append({"field": prefix or "body", "message": str(messages)})
    return out


_STATUS_HEADERS = {
    401: {"WWW-Authenticate": 'Bearer realm="likewise"'},
    503: {"Retry-After": "5"},
}


def _service_error(exc: ServiceError) -> Response:
    return _respond(exc.to_problem(request.path), _STATUS_HEADERS.get(exc.status))


def _store_error(exc: StoreError) -> Response:
    """What persistence refused, as the API says it: missing things are 404, the rest
    (locked features, contention, a duplicate batch) 409."""
    if isinstance(exc, (MissingMetric, MissingVersion)):
        return _service_error(NotFound(str(exc)))
    body = Conflict(str(exc)).to_problem(request.path)
    if isinstance(exc, DuplicateBatch):
        body["batch_id"] = exc.batch_id
        body["detail"] += "; send ?allow_duplicate=true to store it again"
    return _respond(body, None)


def _validation_error(exc: ValidationError) -> Response:
    errors = flatten_messages(exc.messages)
    fields_named = ", ".join(sorted({e["field"] for e in errors}))
    return problem_response(
        422, "Invalid input", f"The request is invalid: {fields_named}.", "invalid-input", errors
    )


_HTTP_SLUGS = {
    400: "malformed-request",
    404: "not-found",
    405: "method-not-allowed",
    408: "request-timeout",
    413: "payload-too-large",
    415: "unsupported-media-type",
}


def _http_error(exc: HTTPException) -> Response:
    status = exc.code or 500
    headers: dict[str, str] = {}
    if isinstance(exc, MethodNotAllowed) and exc.valid_methods:
        headers["Allow"] = ", ".join(sorted(exc.valid_methods))
    detail = exc.description or exc.name
    if status == 404:
        detail = f"No resource at {request.path}."
    elif status == 405:
        detail = f"{request.method} is not allowed on {request.path}."
    elif status == 413:
        limit = request.max_content_length
        detail = f"The request body is larger than the limit of {limit} bytes."
    return problem_response(status, exc.name, detail, _HTTP_SLUGS.get(status), headers=headers)


def _redis_down(exc: Exception) -> Response:
    log.warning("Redis unavailable: %s", exc)
    return problem_response(
        503, "Service unavailable", "The data store does not answer; try again later.",
        "unavailable", headers=_STATUS_HEADERS[503],
    )


def _redis_refused(exc: Exception) -> Response:
    """Redis answers but refuses writes: a replica, out of memory, or it cannot persist
    (MISCONF). Nothing was written; the client may retry later."""
    if isinstance(exc, RedisResponseError) and not isinstance(
        exc, (RedisReadOnlyError, RedisOutOfMemoryError)
    ) and not str(exc).startswith("MISCONF"):
        return _unexpected(exc)
    log.error("Redis refuses writes: %s", exc)
    return problem_response(
        503, "Service unavailable", "The data store refuses writes right now; try again later.",
        "unavailable", headers=_STATUS_HEADERS[503],
    )


def _unexpected(exc: Exception) -> Response:
    if isinstance(exc, HTTPException):
        return _http_error(exc)
    log.exception("unhandled error on %s %s", request.method, request.path)
    return problem_response(
        500, "Internal server error", "The server failed to handle the request; it was logged.",
        "internal-error",
    )


def register_problem_handlers(app: Flask) -> None:
    """Route every kind of failure through :func:`problem_response`."""
    app.register_error_handler(ServiceError, _service_error)
    app.register_error_handler(StoreError, _store_error)
    app.register_error_handler(ValidationError, _validation_error)
    app.register_error_handler(HTTPException, _http_error)
    app.register_error_handler(RedisConnectionError, _redis_down)
    app.register_error_handler(RedisTimeoutError, _redis_down)
    app.register_error_handler(RedisResponseError, _redis_refused)
    app.register_error_handler(Exception, _unexpected)
