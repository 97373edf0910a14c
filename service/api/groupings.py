"""``POST /v1/metrics/{name}/groupings``: group new records with a stored version."""

from __future__ import annotations

from flask import Blueprint, Response

from service.usecases import groupings as uc

from . import telemetry
from .deps import context, reply
from .schemas import GroupingSchema, json_body, table_of

bp = Blueprint("groupings", __name__)


@bp.post("/metrics/<name>/groupings")
def group(name: str) -> Response:
    data = json_body(GroupingSchema())
    result = uc.group(context(), name, table_of(data), data["k"], data.get("version"))
    telemetry.note_grouping(len(result["labels"]))
    return reply(result)
