"""What a view needs from the app: the context and small response helpers."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from flask import Response, current_app, jsonify

if TYPE_CHECKING:
    from service.context import Context


def context() -> Context:
    """The :class:`Context` this app was built with."""
    return current_app.extensions["likewise.context"]


def reply(body: Any, status: int = 200, location: str | None = None) -> Response:
    """A JSON response, with a ``Location`` header when given."""
    resp = jsonify(body)
    resp.status_code = status
    if location is not None:
        resp.headers["Location"] = location
    return resp


def no_content() -> Response:
    return Response(status=204)
