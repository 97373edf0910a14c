"""The Python client against the live service (real HTTP, real Redis, a real worker).

Data: iris as bundled with scikit-learn (Fisher 1936), in labelled batches from
tests/datasets.py. The service's own content hash (``sha256`` of the matrix in the
metric's feature order and the labels) is the reference that the client's encodings of
one batch — dicts, an array with columns, a DataFrame in another column order — carry
the same numbers.
"""

from __future__ import annotations

import ast
import json
import subprocess
import sys
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import yaml

from likewise_client import (
    NO_RETRY,
    Client,
    ProblemError,
    RetryPolicy,
    Unreachable,
    new_key,
)
from tests.api.helpers import IRIS_FEATURES, iris_batches

ROOT = Path(__file__).resolve().parents[2]
FAST = RetryPolicy(attempts=4, first_wait=0.01, max_wait=0.05)


def test_the_client_imports_nothing_of_the_service() -> None:
    code = ("import json, sys\nimport likewise_client\n"
            "print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] in "
            "('flask', 'redis', 'rq', 'marshmallow', 'service', 'workers', 'pandas', "
            "'pyarrow', 'dask'))))")
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout.strip().splitlines()[-1]) == []
    # and no import statement names them; pandas, pyarrow and dask only inside the
    # functions that need them (a DataFrame is handed in by the caller)
    allowed = {"numpy", "httpx", "tenacity", "tqdm"} | set(sys.stdlib_module_names)
    lazy = {"pandas", "pyarrow", "dask"}
    outside = set()
    for path in (ROOT / "likewise_client").glob("*.py"):
        tree = ast.parse(path.read_text())
        inner = {id(n) for f in ast.walk(tree)
                 if isinstance(f, (ast.FunctionDef, ast.AsyncFunctionDef))
                 for n in ast.walk(f)}
        for node in ast.walk(tree):
            ok = allowed | lazy if id(node) in inner else allowed
            if isinstance(node, ast.Import):
                outside |= {a.name.split(".")[0] for a in node.names} - ok
            elif isinstance(node, ast.ImportFrom) and node.level == 0:
                outside |= {(node.module or "").split(".")[0]} - ok
    assert outside == set()


# every operation of openapi.yaml and the client method that calls it
OPERATIONS = {
    "listMetrics": "list_metrics", "putMetric": "put_metric", "getMetric": "get_metric",
    "deleteMetric": "delete_metric", "addBatch": "post_batch", "listBatches": "list_batches",
    "getBatch": "get_batch", "deleteBatch": "delete_batch", "requestFit": "start_fit",
    "listFits": "list_fits", "getFit": "get_fit", "retryFit": "retry_fit",
    "listVersions": "list_versions", "getVersion": "get_version",
    "activateVersion": "activate", "activationHistory": "history", "driftReport": "drift",
    "groupRecords": "group", "queueOverview": "queues", "healthz": "health",
    "readyz": "ready", "prometheusMetrics": "prometheus", "openapiJson": "openapi",
    "openapiYaml": "openapi_yaml", "explainVersion": "explain",
    "startGroupingRun": "start_grouping_run", "getGroupingRun": "get_grouping_run",
    "deleteGroupingRun": "delete_grouping_run", "getGroupingRunResults": "grouping_run_pages",
}


def test_every_documented_operation_has_a_client_method() -> None:
    import yaml

    spec = yaml.safe_load((ROOT / "openapi.yaml").read_text())
    # the console's pages are HTML for a browser, not API operations for a client
    documented = {op["operationId"] for item in spec["paths"].values()
                  for op in item.values() if isinstance(op, dict) and "operationId" in op
                  and "console" not in op.get("tags", [])}
    assert documented == set(OPERATIONS)
    assert all(callable(getattr(Client, method)) for method in OPERATIONS.values())


def test_metric_batches_fit_versions_groupings_end_to_end(live, metric_name) -> None:
    name = metric_name
    with live.client() as lw:
        created = lw.put_metric(name, IRIS_FEATURES, "iris, from the client")
        assert created["name"] == name and created["features"] == IRIS_FEATURES
        assert lw.get_metric(name)["batches"] == 0
        assert name in [m["name"] for m in lw.list_metrics()]

        batches = iris_batches(4)
        (X0, y0), *rest = batches
        records = [dict(zip(IRIS_FEATURES, map(float, row), strict=True)) for row in X0]
        first = lw.post_batch(name, records, y0)
        # the same batch as a DataFrame (columns reversed, labels in a column) and as an
        # array: the service hashes the same matrix and labels
        frame = pd.DataFrame(X0, columns=IRIS_FEATURES)[IRIS_FEATURES[::-1]]
        frame["analyst_group"] = y0
        with pytest.raises(ProblemError) as dup:
            lw.post_batch(name, frame, "analyst_group")
        assert dup.value.status == 409 and dup.value.body["batch_id"] == first["batch_id"]
        again = lw.post_batch(name, frame, "analyst_group", allow_duplicate=True)
        arrayed = lw.post_batch(name, X0, y0, columns=IRIS_FEATURES, allow_duplicate=True)
        assert first["sha256"] == again["sha256"] == arrayed["sha256"]
        assert len({first["batch_id"], again["batch_id"], arrayed["batch_id"]}) == 3
        lw.delete_batch(name, again["batch_id"])
        lw.delete_batch(name, arrayed["batch_id"])
        for X, y in rest:
            lw.post_batch(name, X, y, columns=IRIS_FEATURES)
        listed = lw.list_batches(name)
        assert len(listed) == 4 and listed[0]["batch_id"] == first["batch_id"]
        detail = lw.get_batch(name, first["batch_id"])
        assert sum(detail["group_sizes"].values()) == len(y0)

        fit = lw.start_fit(name, method="auto")
        assert fit["status"] in ("waiting", "running", "succeeded")
        seen = []
        done = lw.wait_for_fit(fit["fit_id"], timeout=120, interval=0.1,
                               on_progress=lambda f: seen.append(f["status"]))
        assert done["status"] == "succeeded", done
        assert seen[-1] == "succeeded" and done["version"] == 1
        assert [f["fit_id"] for f in lw.list_fits(metric=name)] == [fit["fit_id"]]
        assert lw.list_fits(metric=name, status="failed") == []
        with pytest.raises(ProblemError) as not_failed:  # only a failed fit is retried
            lw.retry_fit(fit["fit_id"])
        assert not_failed.value.status == 409

        versions = lw.list_versions(name)
        assert [(v["version"], v["active"]) for v in versions] == [(1, True)]
        report = lw.get_version(name, 1)
        assert report["metric"]["features"] == IRIS_FEATURES

        # grouping: the same records as a DataFrame and as dicts give the same answer
        Xg, yg = iris_batches(1, seed=9)[0]
        k = len(np.unique(yg))
        by_frame = lw.group(name, pd.DataFrame(Xg, columns=IRIS_FEATURES), k)
        by_dicts = lw.group(name, [dict(zip(IRIS_FEATURES, map(float, r), strict=True))
                                   for r in Xg], k, version=1)
        assert by_frame["labels"] == by_dicts["labels"] and len(by_frame["labels"]) == len(yg)
        assert by_frame["version"] == 1 and by_frame["k"] == k
        watched = lw.drift(name, version=1)
        assert watched["version"] == 1 and watched["records"] == 2 * len(yg)
        assert set(watched["features"]) == set(IRIS_FEATURES)

        second = lw.wait_for_fit(lw.start_fit(name, method="euclidean",
                                              activate="by_hand")["fit_id"], timeout=120)
        assert second["version"] == 2
        moved = lw.activate(name, 2, "client test")
        assert moved == {"name": name, "active_version": 2, "previous_version": 1}
        assert [(h["from"], h["to"], h["reason"]) for h in lw.history(name)][-1] == (
            1, 2, "client test")

        overview = lw.queues()
        assert {"queues", "workers"} <= set(overview)
        assert lw.health() == {"status": "ok"}
        ready, body = lw.ready()
        assert ready and body["checks"]["redis"] is True
        assert "likewise_http_requests_total" in lw.prometheus()
        spec = lw.openapi()
        assert "/openapi.json" in spec["paths"] and yaml.safe_load(lw.openapi_yaml()) == spec
        explained = lw.explain(name, 2)
        assert explained["version"] == 2 and set(explained["features"]) == set(
            lw.get_version(name, 2)["metric"]["features"])

        lw.delete_metric(name)
        with pytest.raises(ProblemError) as gone:
            lw.get_metric(name)
        assert gone.value.status == 404


def test_a_refusal_is_one_exception_with_status_title_detail_and_fields(live, metric_name):
    with live.client() as lw:
        with pytest.raises(ProblemError) as bad:
            lw.put_metric(metric_name, ["ok", ""])
        err = bad.value
        assert err.status == 422 and err.title and err.detail
        assert err.field("features[1]") is not None, err.errors
        assert "features[1]" in str(err)
        with pytest.raises(ValueError, match="row 1, column 'b'"):
            lw.post_batch(metric_name, [[1.0, 2.0], [3.0, float("nan")]], [0, 1],
                          columns=["a", "b"])
    with Client(live.url, "not-a-token") as anon, pytest.raises(ProblemError) as denied:
        anon.list_metrics()
    assert denied.value.status == 401


def test_a_batch_resent_after_a_dropped_connection_is_stored_once(live, metric_name, proxy):
    with live.client() as lw:
        lw.put_metric(metric_name, IRIS_FEATURES)
    (X, y), = iris_batches(1)
    flaky = proxy("drop")
    with Client(flaky.url, live.token, retry=FAST) as lw:
        # allow_duplicate: the content check would refuse a second copy anyway; this way
        # only the Idempotency-Key stands between a resend and a duplicate
        stored = lw.post_batch(metric_name, X, y, columns=IRIS_FEATURES,
                               allow_duplicate=True)
        assert flaky.connections == 2  # the first answer was lost; the retry got one
        batches = lw.list_batches(metric_name)
    assert [b["batch_id"] for b in batches] == [stored["batch_id"]]


def test_the_resend_carries_the_same_key_and_gets_the_first_answer(live, metric_name):
    with live.client() as lw:
        lw.put_metric(metric_name, IRIS_FEATURES)
        (X, y), = iris_batches(1)
        body = {"columns": IRIS_FEATURES, "rows": X.tolist(), "groups": y.tolist()}
        key = new_key()
        path = f"/v1/metrics/{metric_name}/batches"
        one = lw.request("POST", path, body, idempotency_key=key)
        two = lw.request("POST", path, body, idempotency_key=key)
        assert (one.status, two.status) == (201, 201)
        assert not one.replayed and two.replayed and one.body == two.body
        assert len(lw.list_batches(metric_name)) == 1


@pytest.mark.parametrize("status", [503, 429])
def test_busy_answers_are_retried(live, proxy, status) -> None:
    busy = proxy(status)
    with Client(busy.url, live.token, retry=FAST) as lw:
        assert isinstance(lw.list_metrics(), list)
    assert busy.connections == 2


def test_retries_are_bounded(live, proxy) -> None:
    busy = proxy(503)
    with Client(busy.url, live.token, retry=NO_RETRY) as lw, \
            pytest.raises(ProblemError) as out:
        lw.list_metrics()
    assert out.value.status == 503 and busy.connections == 1


def test_a_closed_port_is_unreachable_after_the_retries() -> None:
    import socket

    with socket.socket() as s:  # free a moment ago; nothing listens now
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with Client(f"http://127.0.0.1:{port}", "t", retry=FAST) as lw, \
            pytest.raises(Unreachable, match="tried 4 times"):
        lw.list_metrics()


def test_the_wait_grows_is_jittered_capped_and_honours_retry_after() -> None:
    policy = RetryPolicy(first_wait=1.0, max_wait=4.0)

    def state(n: int, retry_after: str | None = None):
        headers = {"Retry-After": retry_after} if retry_after else {}
        answer = SimpleNamespace(headers=headers)
        outcome = SimpleNamespace(failed=False, result=lambda: answer)
        return SimpleNamespace(attempt_number=n, outcome=outcome)

    for n, bound in ((1, 1.0), (2, 2.0), (3, 4.0), (8, 4.0)):
        waits = [policy.wait(state(n)) for _ in range(200)]
        assert 0 <= min(waits) and max(waits) <= bound
        assert len(set(waits)) > 1  # jittered
    assert policy.wait(state(1, "3")) >= 3.0
    assert policy.wait(state(1, "600")) == 4.0  # never longer than max_wait
