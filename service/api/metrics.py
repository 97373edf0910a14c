"""``/v1/metrics``: create or update, list, read, delete a metric."""

from __future__ import annotations

from flask import Blueprint, Response

from service.usecases import metrics as uc

from .auth import current
from .deps import context, no_content, reply
from .idempotency import idempotent
from .schemas import MetricSchema, PageQuerySchema, json_body, query_args

bp = Blueprint("metrics", __name__)


@bp.put("/metrics/<name>")
@idempotent
def put_metric(name: str) -> Response:
    data = json_body(MetricSchema())
    metric, created = uc.put_metric(
        context(), name, data["features"], data["description"],
        categories=data["categories"], missing_values=data["missing_values"],
        ignore_extra_columns=data["ignore_extra_columns"])
    if created:
        return reply(metric, 201, location=f"/v1/metrics/{name}")
    return reply(metric)


@bp.get("/metrics")
def list_metrics() -> Response:
    query = query_args(PageQuerySchema())
    return reply(uc.list_metrics(context(), query.get("limit"), query.get("cursor"),
                                 visible=current().may_touch))


@bp.get("/metrics/<name>")
def get_metric(name: str) -> Response:
    return reply(uc.get_metric(context(), name))


@bp.delete("/metrics/<name>")
def delete_metric(name: str) -> Response:
    uc.delete_metric(context(), name)
    return no_content()
