"""Probes, queue overview, Prometheus metrics, auth on every route, and generic errors
(unknown route, wrong method, unexpected exception, Redis down)."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from collections.abc import Callable, Iterator

import pytest
import redis

from service.api import create_app
from service.config import Settings
from service.context import Context

from .conftest import ADMIN_TOKEN
from .helpers import assert_problem
from .spec import SpecClient, load_spec, spec_operations

WORKER_START_TIMEOUT = 60.0  # seconds; a bound, not a synchronisation


def test_healthz_needs_no_token(api: SpecClient) -> None:
    resp = api.get("/healthz", auth=False)
    assert resp.status_code == 200 and resp.get_json() == {"status": "ok"}


def test_readyz_is_503_without_a_worker(api: SpecClient, unchanged) -> None:
    with unchanged():
        resp = api.get("/readyz", auth=False)
    body = assert_problem(resp, 503)
    assert body["checks"] == {"redis": True, "workers_seen": 0}
    assert resp.headers["Retry-After"]


@pytest.fixture
def live_worker(ctx: Context) -> Iterator[subprocess.Popen]:
    """A real worker process on this test's queue, stopped (SIGTERM) at the end."""
    s = ctx.settings
    env = {**os.environ, "LIKEWISE_REDIS_URL": s.redis_url, "LIKEWISE_KEY_PREFIX": s.key_prefix,
           "LIKEWISE_QUEUE": s.queue_name}
    code = (
        "from service.config import Settings; from workers.worker import run_worker; "
        f"run_worker(Settings.from_env(), name={s.key_prefix + '-live'!r})"
    )
    proc = subprocess.Popen([sys.executable, "-c", code], env=env)
    try:
        yield proc
    finally:
        proc.terminate()
        proc.wait(timeout=30)


def _poll(check: Callable[[], bool], timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():
            return True
        time.sleep(0.1)  # polling interval of a bounded wait
    return False


def test_readyz_and_queues_with_a_live_worker(
    api: SpecClient, ctx: Context, live_worker: subprocess.Popen
) -> None:
    assert _poll(lambda: api.get("/readyz", auth=False).status_code == 200,
                 WORKER_START_TIMEOUT), "the worker never showed up"
    ready = api.get("/readyz", auth=False).get_json()
    assert ready["checks"]["redis"] is True and ready["checks"]["workers_seen"] >= 1
    workers = api.get("/v1/queues").get_json()["workers"]
    assert [w["name"] for w in workers] == [f"{ctx.settings.key_prefix}-live"]
    assert workers[0]["queues"] == [ctx.settings.queue_name]
    assert workers[0]["last_heartbeat"] is not None


def test_queue_counts_follow_a_fit(
    api: SpecClient, ctx: Context, with_batches: list[str], run_worker_burst
) -> None:
    empty = api.get("/v1/queues").get_json()["queues"]
    assert [(q["name"], q["waiting"], q["oldest_waiting_seconds"]) for q in empty] == [
        (ctx.settings.queue_name, 0, None)
    ]
    api.post("/v1/metrics/iris/fits")
    queued = api.get("/v1/queues").get_json()["queues"][0]
    assert queued["waiting"] == 1 and queued["oldest_waiting_seconds"] >= 0
    run_worker_burst(ctx, max_jobs=1)
    done = api.get("/v1/queues").get_json()
    assert (done["queues"][0]["waiting"], done["queues"][0]["done"]) == (0, 1)
    assert done["workers"] == []  # a burst worker unregisters when it stops


def test_prometheus_exposition(api: SpecClient) -> None:
    api.get("/healthz", auth=False)
    api.get("/v1/metrics/nothing")
    resp = api.get("/metrics", auth=False)
    text = resp.get_data(as_text=True)
    assert resp.mimetype == "text/plain"
    assert 'likewise_http_requests_total{method="GET",route="/healthz",status="200"} 1.0' in text
    assert 'route="/v1/metrics/<name>",status="404"' in text
    assert "likewise_http_request_duration_seconds_bucket" in text


# ------------------------------------------------------------------ auth, every route
def _concrete(path: str) -> str:
    values = {"{name}": "iris", "{batch_id}": "0123456789abcdef",
              "{fit_id}": "0123456789abcdef0123", "{n}": "1",
              "{run_id}": "0123456789abcdef0123"}
    for key, value in values.items():
        path = path.replace(key, value)
    return path


V1_OPERATIONS = sorted(op for op in spec_operations(load_spec()) if op[0].startswith("/v1/"))
BAD_AUTH = [None, "Basic YWRtaW46eA==", "Bearer", "Bearer ", "Bearer wrong-token",
            f"Bearer {ADMIN_TOKEN}x", f"bearer{ADMIN_TOKEN}"]


@pytest.mark.parametrize(("path", "method"), V1_OPERATIONS)
def test_every_v1_route_needs_a_valid_bearer_token(
    api: SpecClient, metric: str, unchanged, path: str, method: str
) -> None:
    url = _concrete(path)
    with unchanged():
        for header in BAD_AUTH:
            headers = {"Authorization": header} if header is not None else {}
            resp = api.open(method.upper(), url, auth=False, headers=headers, json={})
            assert_problem(resp, 401)
            assert resp.headers["WWW-Authenticate"].startswith("Bearer")


def test_lowercase_scheme_is_accepted(api: SpecClient, metric: str) -> None:
    resp = api.get("/v1/metrics/iris", auth=False,
                   headers={"Authorization": f"bearer {ADMIN_TOKEN}"})
    assert resp.status_code == 200


def test_no_token_configured_means_every_call_is_401(ctx: Context, unchanged) -> None:
    bare = Context.build(ctx.settings.replace(admin_token=None, tokens={}),
                         connection=ctx.redis)
    api = SpecClient(create_app(context=bare), ADMIN_TOKEN)
    with unchanged():
        assert_problem(api.get("/v1/metrics"), 401)
        assert_problem(api.put("/v1/metrics/iris", json={"features": ["a"]}), 401)


# -------------------------------------------------------------------- generic errors
def test_unknown_route_is_404_problem(api: SpecClient, unchanged) -> None:
    with unchanged():
        for path in ("/", "/v1", "/v2/metrics", "/v1/metrics/iris/nothing"):
            assert_problem(api.get(path), 404)


def test_wrong_method_is_405_problem_with_allow(api: SpecClient, unchanged) -> None:
    with unchanged():
        resp = api.post("/v1/metrics/iris", json={"features": ["a"]})
        assert_problem(resp, 405)
        assert set(resp.headers["Allow"].split(", ")) >= {"GET", "PUT", "DELETE"}
        assert_problem(api.delete("/healthz", auth=False), 405)
        assert_problem(api.open("PATCH", "/v1/metrics", json={}), 405)


def test_unexpected_exception_is_500_problem_without_trace(ctx: Context) -> None:
    app = create_app(context=ctx)

    @app.get("/boom")
    def boom() -> str:
        raise RuntimeError("secret internals")

    resp = app.test_client().get("/boom")
    assert resp.status_code == 500
    assert resp.mimetype == "application/problem+json"
    body = resp.get_json()
    assert body["status"] == 500 and body["instance"] == "/boom"
    assert body["type"] == "urn:likewise:problem:internal-error"
    text = resp.get_data(as_text=True)
    assert "secret internals" not in text and "Traceback" not in text


@pytest.mark.parametrize("exc", [
    redis.exceptions.ReadOnlyError("READONLY You can't write against a read only replica."),
    redis.exceptions.OutOfMemoryError("OOM command not allowed when used memory > 'maxmemory'."),
    redis.exceptions.ResponseError("MISCONF Redis is configured to save RDB snapshots, but..."),
])
def test_redis_refusing_writes_is_503_problem(ctx: Context, exc: Exception) -> None:
    # Fault injection: a real Redis refusing writes cannot be provoked on the shared server.
    app = create_app(context=ctx)

    @app.post("/refuse")
    def refuse() -> str:
        raise exc

    resp = app.test_client().post("/refuse")
    assert resp.status_code == 503 and resp.mimetype == "application/problem+json"
    assert resp.headers["Retry-After"] == "5"
    assert resp.get_json()["type"] == "urn:likewise:problem:unavailable"


def test_other_redis_errors_stay_500(ctx: Context) -> None:
    app = create_app(context=ctx)

    @app.get("/wrongtype")
    def wrongtype() -> str:
        raise redis.exceptions.ResponseError("WRONGTYPE Operation against a key ...")

    assert app.test_client().get("/wrongtype").status_code == 500


def test_redis_down_is_503_problem() -> None:
    # Nobody listens on port 1: every data route fails fast and answers 503.
    settings = Settings(redis_url="redis://127.0.0.1:1/0", admin_token=ADMIN_TOKEN)
    api = SpecClient(create_app(settings), ADMIN_TOKEN)
    assert_problem(api.get("/v1/metrics"), 503)
    assert_problem(api.put("/v1/metrics/iris", json={"features": ["a"]}), 503)
    ready = api.get("/readyz", auth=False)
    assert_problem(ready, 503)
    assert ready.get_json()["checks"]["redis"] is False


# ------------------------------------------------- errors shared by families of routes
VALID_ENVELOPES = {
    ("/v1/metrics/{name}", "put"): {"features": ["a"]},
    ("/v1/metrics/{name}/batches", "post"): {"records": [{"a": 1}, {"a": 2}], "groups": [0, 1]},
    ("/v1/metrics/{name}/fits", "post"): {},
    ("/v1/metrics/{name}/active", "put"): {"version": 1},
    ("/v1/metrics/{name}/groupings", "post"): {"records": [{"a": 1}]},
    ("/v1/metrics/{name}/grouping-runs", "post"): {"records": [{"a": 1}]},
}
NAMED_OPERATIONS = [op for op in V1_OPERATIONS if "{name}" in op[0]]
BODY_OPERATIONS = sorted(VALID_ENVELOPES)


def test_body_operations_are_the_documented_ones() -> None:
    spec = load_spec()
    with_body = {(p, m) for p, m in V1_OPERATIONS if "requestBody" in spec["paths"][p][m]}
    assert with_body == set(BODY_OPERATIONS)


@pytest.mark.parametrize(("path", "method"), NAMED_OPERATIONS)
def test_every_route_with_a_metric_name_rejects_an_invalid_one(
    api: SpecClient, unchanged, path: str, method: str
) -> None:
    url = _concrete(path).replace("/iris", "/Not_Valid!", 1)
    body = VALID_ENVELOPES.get((path, method))
    with unchanged():
        resp = api.open(method.upper(), url, **({"json": body} if body is not None else {}))
        assert_problem(resp, 422, "name")


@pytest.mark.parametrize(("path", "method"), BODY_OPERATIONS)
def test_every_body_over_the_request_limit_is_413(
    ctx: Context, metric: str, unchanged, path: str, method: str
) -> None:
    small = Context.build(ctx.settings.replace(max_request_bytes=256, max_run_request_bytes=256),
                          connection=ctx.redis)
    api = SpecClient(create_app(context=small), ADMIN_TOKEN)
    body = {**VALID_ENVELOPES[(path, method)], "padding": "x" * 300}
    with unchanged():
        body_resp = assert_problem(api.open(method.upper(), _concrete(path), json=body), 413)
    assert "256" in body_resp["detail"]
