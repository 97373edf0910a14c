"""Fits: request one for a metric (202 + Location), follow it, list, retry."""

from __future__ import annotations

from flask import Blueprint, Response

from service.usecases import fits as uc

from .auth import current, principal
from .deps import context, reply
from .idempotency import idempotent
from .schemas import FitQuerySchema, FitSchema, json_body, query_args

bp = Blueprint("fits", __name__)


def _accepted(fit: dict) -> Response:
    return reply(fit, 202, location=f"/v1/fits/{fit['fit_id']}")


@bp.post("/metrics/<name>/fits")
@idempotent
def request_fit(name: str) -> Response:
    params = json_body(FitSchema(), empty_ok=True)
    fit, _queued = uc.request_fit(context(), name, params, principal())
    return _accepted(fit)


@bp.get("/fits")
def list_fits() -> Response:
    query = query_args(FitQuerySchema())
    return reply(uc.list_fits(context(), query.get("metric"), query.get("status"),
                              query.get("limit"), query.get("cursor"),
                              visible=current().may_touch))


@bp.get("/fits/<fit_id>")
def get_fit(fit_id: str) -> Response:
    return reply(uc.get_fit(context(), fit_id))


@bp.post("/fits/<fit_id>/retry")
@idempotent
def retry_fit(fit_id: str) -> Response:
    return _accepted(uc.retry_fit(context(), fit_id, principal()))
