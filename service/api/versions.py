"""Versions of a metric, which one is active, and the history of activations."""

from __future__ import annotations

from flask import Blueprint, Response

from service.usecases import versions as uc
from service.usecases.params import version_number

from .auth import principal
from .deps import context, reply
from .idempotency import idempotent
from .schemas import ActivationSchema, PageQuerySchema, json_body, query_args

bp = Blueprint("versions", __name__)


@bp.get("/metrics/<name>/versions")
def list_versions(name: str) -> Response:
    query = query_args(PageQuerySchema())
    return reply(uc.list_versions(context(), name, query.get("limit"), query.get("cursor")))


@bp.get("/metrics/<name>/versions/<int:n>")
def get_version(name: str, n: int) -> Response:
    return reply(uc.get_version(context(), name, version_number(n)))


@bp.get("/metrics/<name>/versions/<int:n>/explanation")
def explain_version(name: str, n: int) -> Response:
    return reply(uc.explain_version(context(), name, version_number(n)))


@bp.put("/metrics/<name>/active")
@idempotent
def activate(name: str) -> Response:
    data = json_body(ActivationSchema())
    return reply(uc.activate(context(), name, data["version"], data["reason"], principal()))


@bp.get("/metrics/<name>/history")
def history(name: str) -> Response:
    query = query_args(PageQuerySchema())
    return reply(uc.history(context(), name, query.get("limit"), query.get("cursor")))
