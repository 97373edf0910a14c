"""Prometheus exposition at ``GET /metrics`` that adds up across web processes.

Two kinds of series (the README's "Telemetry" section lists every one):

- **measured in the web process** — requests, their latency, groupings' size and
  latency. Under gunicorn (``PROMETHEUS_MULTIPROC_DIR`` set by the launcher or by
  :mod:`service.webserver`) they use prometheus-client's multiprocess mode: each
  process writes its samples to files in that folder and a scrape, whichever process
  answers it, sums every process's files. Without the variable (tests that build
  several apps in one process) each app keeps its own registry.
- **read from Redis at scrape time** by one collector (:class:`StoreCollector`) —
  fits ended by outcome and their run time, the queue's depth and oldest wait,
  versions activated — so every process reports the same numbers.

Routes are labelled by their URL rule (``/v1/metrics/<name>``), never the raw path,
to keep the label set small.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Iterator
from dataclasses import dataclass
from typing import TYPE_CHECKING

from flask import Flask, Response, g, request
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Histogram,
    generate_latest,
)
from prometheus_client.core import (
    CounterMetricFamily,
    GaugeMetricFamily,
    HistogramMetricFamily,
    Metric,
)
from prometheus_client.multiprocess import MultiProcessCollector

from service.usecases import telemetry as uc

if TYPE_CHECKING:
    from service.context import Context

MULTIPROC_ENV = "PROMETHEUS_MULTIPROC_DIR"
# records per grouping request: from a handful to LIKEWISE_MAX_BATCH_RECORDS (100 000)
GROUPING_RECORD_BUCKETS = (1, 10, 100, 1_000, 10_000, 100_000)

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class _HttpSeries:
    requests: Counter
    latency: Histogram
    grouping_records: Histogram
    grouping_latency: Histogram


def _http_series(registry: CollectorRegistry | None) -> _HttpSeries:
    return _HttpSeries(
        Counter("likewise_http_requests", "HTTP requests handled.",
                ["method", "route", "status"], registry=registry),
        Histogram("likewise_http_request_duration_seconds", "Time to handle an HTTP request.",
                  ["method", "route"], registry=registry),
        Histogram("likewise_grouping_records", "Records grouped per successful grouping.",
                  buckets=GROUPING_RECORD_BUCKETS, registry=registry),
        Histogram("likewise_grouping_duration_seconds",
                  "Time to answer a successful grouping request.", registry=registry),
    )


_process_series: _HttpSeries | None = None


def _shared_series() -> _HttpSeries:
    """One set per process in multiprocess mode (the files are per process, so two
    objects for one series would overwrite each other's counts)."""
    global _process_series
    if _process_series is None:
        _process_series = _http_series(None)
    return _process_series


def multiprocess_dir() -> str | None:
    return os.environ.get(MULTIPROC_ENV) or None


class StoreCollector:
    """Series read from Redis at scrape time (the same in every process)."""

    def __init__(self, ctx: Context) -> None:
        self.ctx = ctx

    def collect(self) -> Iterator[Metric]:
        up = GaugeMetricFamily("likewise_store_up",
                               "1 when the series read from Redis could be read at this scrape.")
        try:
            snap = uc.snapshot(self.ctx)
        except Exception as exc:  # noqa: BLE001 — the HTTP series are still worth serving
            log.warning("telemetry: the data store did not answer (%s)", type(exc).__name__)
            up.add_metric([], 0)
            yield up
            return
        up.add_metric([], 1)
        yield up
        ended = CounterMetricFamily(
            "likewise_fits_ended", "Fits that reached an end state, by outcome (a fit "
            "retried by a person and ending again counts again).", labels=["outcome"])
        run = HistogramMetricFamily(
            "likewise_fit_run_seconds", "Run time of ended fits, from the first attempt's "
            "start to the end, by outcome (fits that never started are not observed).",
            labels=["outcome"])
        for outcome, tally in snap["fits"].items():
            ended.add_metric([outcome], tally["ended"])
            run.add_metric([outcome], buckets=tally["buckets"], sum_value=tally["seconds"])
        yield ended
        yield run
        depth = GaugeMetricFamily("likewise_fit_queue_depth",
                                  "Fits on the queue now, by state.", labels=["state"])
        for state, count in snap["queue"]["depth"].items():
            depth.add_metric([state], count)
        yield depth
        yield GaugeMetricFamily(
            "likewise_fit_queue_oldest_waiting_seconds",
            "How long the oldest waiting fit has waited (0 when none waits).",
            value=snap["queue"]["oldest_waiting_seconds"])
        activated = CounterMetricFamily(
            "likewise_versions_activated", "Versions made active, by who made them active "
            "(fit: a fit's activation policy; operator: an activation or roll-back request).",
            labels=["by"])
        for by, count in snap["activations"].items():
            activated.add_metric([by], count)
        yield activated
        verdict = GaugeMetricFamily(
            "likewise_drift_verdict", "1 for each metric's drift verdict on its active "
            "version over the retained window (quiet, steady, shifting, drifted).",
            labels=["metric", "verdict"])
        flagged = GaugeMetricFamily(
            "likewise_drift_flagged_features", "Features whose drift verdict is shifting "
            "or drifted, per metric (active version).", labels=["metric"])
        for metric, seen in snap["drift"].items():
            if seen["verdict"] is not None:
                verdict.add_metric([metric, seen["verdict"]], 1)
                flagged.add_metric([metric], len(seen["flagged"]))
        yield verdict
        yield flagged


def note_grouping(records: int) -> None:
    """Mark the current request as a grouping of ``records`` records (observed when
    the response leaves)."""
    g.likewise_grouped = records


def install(app: Flask, ctx: Context) -> None:
    """Count every request and serve ``/metrics``."""
    shared = multiprocess_dir() is not None
    own = None if shared else CollectorRegistry()
    series = _shared_series() if shared else _http_series(own)
    store = StoreCollector(ctx)
    if own is not None:
        own.register(store)

    @app.before_request
    def _start() -> None:
        g.likewise_started = time.perf_counter()

    @app.after_request
    def _observe(response: Response) -> Response:
        started = g.get("likewise_started")
        route = request.url_rule.rule if request.url_rule is not None else "<unmatched>"
        series.requests.labels(request.method, route, str(response.status_code)).inc()
        if started is not None:
            took = time.perf_counter() - started
            series.latency.labels(request.method, route).observe(took)
            grouped = g.get("likewise_grouped")
            if grouped is not None and response.status_code == 200:
                series.grouping_records.observe(grouped)
                series.grouping_latency.observe(took)
        return response

    @app.get("/metrics", endpoint="prometheus_metrics")
    def _exposition() -> Response:
        registry = own
        if registry is None:
            registry = CollectorRegistry()
            MultiProcessCollector(registry)
            registry.register(store)
        return Response(generate_latest(registry), mimetype=CONTENT_TYPE_LATEST)
