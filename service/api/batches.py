"""``/v1/metrics/{name}/batches``: labelled batches in, their summaries out."""

from __future__ import annotations

from flask import Blueprint, Response, request

from service import batch_stats
from service.usecases import batches as uc

from .deps import context, no_content, reply
from .formats import read_table
from .idempotency import idempotent
from .schemas import (
    BatchQuerySchema,
    BatchStatsQuerySchema,
    BatchStatsSchema,
    PageQuerySchema,
    json_body,
    query_args,
)

bp = Blueprint("batches", __name__)


@bp.post("/metrics/<name>/batches")
@idempotent
def add_batch(name: str) -> Response:
    if request.mimetype == batch_stats.MEDIA_TYPE:  # statistics only, no records
        options = query_args(BatchStatsQuerySchema())
        batch = uc.add_batch_stats(context(), name, json_body(BatchStatsSchema()),
                                   allow_duplicate=options["allow_duplicate"])
    else:
        table, options = read_table("batch", BatchQuerySchema(),
                                    also_accepted=(batch_stats.MEDIA_TYPE,))
        batch = uc.add_batch(context(), name, table,
                             allow_duplicate=options["allow_duplicate"],
                             ignore_extra=options["ignore_extra_columns"])
    return reply(batch, 201, location=f"/v1/metrics/{name}/batches/{batch['batch_id']}")


@bp.get("/metrics/<name>/batches")
def list_batches(name: str) -> Response:
    query = query_args(PageQuerySchema())
    return reply(uc.list_batches(context(), name, query.get("limit"), query.get("cursor")))


@bp.get("/metrics/<name>/batches/<batch_id>")
def get_batch(name: str, batch_id: str) -> Response:
    return reply(uc.get_batch(context(), name, batch_id))


@bp.delete("/metrics/<name>/batches/<batch_id>")
def delete_batch(name: str, batch_id: str) -> Response:
    uc.delete_batch(context(), name, batch_id)
    return no_content()
