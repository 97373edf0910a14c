"""The HTTP API: ``create_app`` builds a Flask app around one :class:`Context`.

Nothing connects at import time; ``create_app`` wires the context (Redis connects on
first use). Routes: ``/v1/...`` (Bearer auth), ``/healthz``, ``/readyz``, ``/metrics``,
``/openapi.yaml``, ``/openapi.json``, and the operators' console under ``/console/``
(its data parts need a Bearer token too).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from flask import Blueprint, Flask

from .auth import require_token
from .bodies import bound_body
from .problems import register_problem_handlers

if TYPE_CHECKING:
    from service.config import Settings
    from service.context import Context


# the longest a request waits for Redis before answering 503 (a 64 MiB batch is
# written in well under this on a healthy server)
REDIS_ANSWER_SECONDS = 1.5


def create_app(settings: Settings | None = None, context: Context | None = None) -> Flask:
    """Build the app. ``context`` wins over ``settings``; with neither, the environment."""
    from service.config import Settings
    from service.context import Context

    from . import (
        batches,
        console,
        drift,
        fits,
        grouping_runs,
        groupings,
        handoff,
        health,
        metrics,
        openapi,
        telemetry,
        tracing,
        versions,
    )
    from .jsonio import FastJSON

    if context is None:
        context = Context.build(settings if settings is not None else Settings.from_env(),
                                answer_within=REDIS_ANSWER_SECONDS)
    settings = context.settings

    app = Flask(__name__, static_folder=None)
    app.json = FastJSON(app)  # keeps the use cases' key order
    app.config["MAX_CONTENT_LENGTH"] = settings.max_request_bytes
    app.extensions["likewise.context"] = context
    app.extensions["likewise.tokens"] = settings.token_book()

    register_problem_handlers(app)
    tracing.install(app)  # first: even a refused request gets an id and a log line
    handoff.install(app)  # a request's handed-off work waits until its answer is sent
    app.before_request(bound_body)
    telemetry.install(app, context)

    v1 = Blueprint("v1", __name__, url_prefix="/v1")
    v1.before_request(require_token)
    for module in (metrics, batches, fits, versions, groupings, grouping_runs, drift):
        v1.register_blueprint(module.bp)
    v1.register_blueprint(health.v1_bp)
    app.register_blueprint(v1)
    app.register_blueprint(health.bp)
    app.register_blueprint(console.bp)
    app.register_blueprint(openapi.bp)
    return app


__all__ = ["create_app"]
