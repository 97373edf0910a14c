"""``/metrics`` in one process: the series read from Redis follow the fit records, the
queue and the activation history; groupings are measured; a scrape without Redis
still answers. (Several processes: ``tests/e2e/test_telemetry.py``.)
Data: scikit-learn's bundled iris (Fisher 1936)."""

from __future__ import annotations

from collections.abc import Callable

from prometheus_client.parser import text_string_to_metric_families

from service.api import create_app
from service.config import Settings
from service.context import Context
from service.store.tallies import FIT_SECONDS_BUCKETS

from .conftest import ADMIN_TOKEN
from .helpers import as_records, iris_batches, post_batches
from .spec import SpecClient
from .test_fits import _failed_fit


def scrape(api: SpecClient) -> dict[tuple[str, tuple], float]:
    resp = api.get("/metrics", auth=False)
    assert resp.status_code == 200 and resp.mimetype == "text/plain"
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for family in text_string_to_metric_families(resp.get_data(as_text=True))
            for s in family.samples}


def test_fit_series_follow_the_fit_records(
    api: SpecClient, ctx: Context, metric: str, run_worker_burst: Callable
) -> None:
    start = scrape(api)
    assert start[("likewise_fits_ended_total", (("outcome", "failed"),))] == 0
    assert start[("likewise_fit_queue_oldest_waiting_seconds", ())] == 0
    ids = post_batches(api, "iris", iris_batches(2))
    failed = _failed_fit(api, ctx, ids, run_worker_burst)
    post_batches(api, "iris", iris_batches(1, seed=7))
    api.post(f"/v1/fits/{failed['fit_id']}/retry")

    waiting = scrape(api)
    assert waiting[("likewise_fit_queue_depth", (("state", "waiting"),))] == 1
    assert waiting[("likewise_fit_queue_oldest_waiting_seconds", ())] >= 0
    run_worker_burst(ctx, max_jobs=1)
    assert api.get(f"/v1/fits/{failed['fit_id']}").get_json()["status"] == "succeeded"
    assert api.put("/v1/metrics/iris/active",
                   json={"version": 1, "reason": "check"}).status_code == 200

    s = scrape(api)
    for outcome in ("failed", "succeeded"):  # the fit failed once, then succeeded
        labels = (("outcome", outcome),)
        assert s[("likewise_fits_ended_total", labels)] == 1
        assert s[("likewise_fit_run_seconds_count", labels)] == 1
        assert s[("likewise_fit_run_seconds_bucket", (("le", "+Inf"), *labels))] == 1
        assert s[("likewise_fit_run_seconds_sum", labels)] >= 0
        buckets = [s[("likewise_fit_run_seconds_bucket", (("le", str(b)), *labels))]
                   for b in FIT_SECONDS_BUCKETS]
        assert buckets == sorted(buckets)  # cumulative
    assert s[("likewise_versions_activated_total", (("by", "fit"),))] == 1
    assert s[("likewise_versions_activated_total", (("by", "operator"),))] == 1
    assert s[("likewise_fit_queue_depth", (("state", "waiting"),))] == 0
    assert s[("likewise_store_up", ())] == 1


def test_a_grouping_is_measured(api: SpecClient, fitted: dict) -> None:
    X, _ = iris_batches(1, seed=3)[0]
    resp = api.post("/v1/metrics/iris/groupings", json={"records": as_records(X), "k": 2})
    assert resp.status_code == 200
    assert api.post("/v1/metrics/iris/groupings",
                    json={"records": as_records(X), "k": 0}).status_code == 422
    s = scrape(api)
    assert s[("likewise_grouping_records_count", ())] == 1  # the refused one is not
    assert s[("likewise_grouping_records_sum", ())] == len(X)
    assert s[("likewise_grouping_duration_seconds_count", ())] == 1


def test_metrics_answer_without_redis() -> None:
    # nobody listens on port 1: the HTTP series are served, the Redis ones are not
    settings = Settings(redis_url="redis://127.0.0.1:1/0", admin_token=ADMIN_TOKEN)
    api = SpecClient(create_app(settings), ADMIN_TOKEN)
    api.get("/healthz", auth=False)
    s = scrape(api)
    assert s[("likewise_store_up", ())] == 0
    assert ("likewise_fits_ended_total", (("outcome", "failed"),)) not in s
    assert s[("likewise_http_requests_total",
              (("method", "GET"), ("route", "/healthz"), ("status", "200")))] == 1
