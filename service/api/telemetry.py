"""Request counts and latency in Prometheus exposition format at ``GET /metrics``.

Each app gets its own registry, so several apps in one process (tests) do not clash.
Routes are labelled by their URL rule (``/v1/metrics/<name>``), never the raw path,
to keep the label set small.
"""

from __future__ import annotations

import time

from flask import Flask, Response, g, request
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Histogram,
    generate_latest,
)


def install(app: Flask) -> None:
    registry = CollectorRegistry()
    requests = Counter(
        "likewise_http_requests", "HTTP requests handled.",
        ["method", "route", "status"], registry=registry,
    )
    latency = Histogram(
        "likewise_http_request_duration_seconds", "Time to handle an HTTP request.",
        ["method", "route"], registry=registry,
    )

    @app.before_request
    def _start() -> None:
        g.likewise_started = time.perf_counter()

    @app.after_request
    def _observe(response: Response) -> Response:
        started = g.get("likewise_started")
        route = request.url_rule.rule if request.url_rule is not None else "<unmatched>"
        requests.labels(request.method, route, str(response.status_code)).inc()
        if started is not None:
            latency.labels(request.method, route).observe(time.perf_counter() - started)
        return response

    @app.get("/metrics", endpoint="prometheus_metrics")
    def _exposition() -> Response:
        return Response(generate_latest(registry), mimetype=CONTENT_TYPE_LATEST)
