"""``POST /v1/metrics/{name}/groupings``: group new records with a stored version."""

from __future__ import annotations

from flask import Blueprint, Response

from service.usecases import groupings as uc

from . import telemetry
from .deps import context, reply
from .formats import read_table
from .schemas import GroupingQuerySchema

bp = Blueprint("groupings", __name__)
# built once: a schema keeps no state between loads, and building one copies its fields
_QUERY = GroupingQuerySchema()


@bp.post("/metrics/<name>/groupings")
def group(name: str) -> Response:
    table, options = read_table("grouping", _QUERY,
                                tabular_only=("k", "version"))
    result = uc.group(context(), name, table, options.get("k"), options.get("version"),
                      ignore_extra=options["ignore_extra_columns"],
                      id_column=options.get("id_column"))
    telemetry.note_grouping(len(result["labels"]))
    return reply(result)
