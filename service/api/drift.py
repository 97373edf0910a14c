"""``GET /v1/metrics/{name}/drift``: how far grouped records are from a version's training."""

from __future__ import annotations

from flask import Blueprint, Response

from service.usecases import drift as uc

from .deps import context, reply
from .schemas import DriftQuerySchema, query_args

bp = Blueprint("drift", __name__)


@bp.get("/metrics/<name>/drift")
def drift_report(name: str) -> Response:
    query = query_args(DriftQuerySchema())
    return reply(uc.report(context(), name, query.get("version"), query.get("since")))
