"""Liveness, readiness (no auth) and the fit-queue overview (``/v1/queues``)."""

from __future__ import annotations

from flask import Blueprint, Response

from service.usecases import queues as uc

from .auth import current
from .deps import context, reply
from .problems import problem_response

bp = Blueprint("health", __name__)
v1_bp = Blueprint("queues", __name__)


@bp.get("/healthz")
def healthz() -> Response:
    """The process is up and answering; checks nothing else."""
    return reply({"status": "ok"})


@bp.get("/readyz")
def readyz() -> Response:
    """Ready when Redis answers and a worker was seen recently; else 503."""
    ok, checks = uc.readiness(context())
    if ok:
        return reply({"status": "ready", "checks": checks})
    return problem_response(
        503, "Not ready", "Redis does not answer or no fit worker was seen recently.",
        "not-ready", headers={"Retry-After": "5"}, extra={"checks": checks},
    )


@v1_bp.get("/queues")
def queues() -> Response:
    return reply(uc.queue_overview(context(), visible=current().may_touch))
