"""Retries never duplicate data: ``Idempotency-Key`` on every creating route, and a
content check on batches. Real Redis; the fits run on real burst workers.

Data: iris (Fisher 1936) as bundled with scikit-learn.
"""

from __future__ import annotations

import json
import threading
from typing import Any

import numpy as np
from numpy.testing import assert_allclose

from service.api.idempotency import CLAIM_SECONDS, HEADER, fingerprint, slot
from service.context import Context
from service.core import BatchStats
from service.usecases.batches import load_training_data
from tests.datasets import load_open, make_batches

from .conftest import ADMIN_TOKEN, ETL_TOKEN
from .helpers import IRIS_FEATURES, assert_problem, iris_batches, records_body
from .spec import SpecClient

URL = "/v1/metrics/iris/batches"


def _key(value: str) -> dict[str, str]:
    return {HEADER: value}


def test_same_key_same_batch_replays_the_first_answer(api: SpecClient, ctx: Context,
                                                      metric: str) -> None:
    X, y = iris_batches(1, seed=4)[0]
    first = api.post(URL, json=records_body(X, y), headers=_key("etl-run-7/part-1"))
    again = api.post(URL, json=records_body(X, y), headers=_key("etl-run-7/part-1"))
    assert first.status_code == again.status_code == 201
    assert again.get_json() == first.get_json()
    assert again.headers["Location"] == first.headers["Location"]
    assert again.headers["Answer-Replayed"] == "true"
    assert "Answer-Replayed" not in first.headers
    assert api.get("/v1/metrics/iris").get_json()["batches"] == 1
    # the answer is kept for the documented time (LIKEWISE_IDEMPOTENCY_HOURS)
    [slot] = ctx.redis.keys(f"{ctx.settings.key_prefix}:idem:*")
    assert CLAIM_SECONDS < ctx.redis.ttl(slot) <= ctx.settings.idempotency_hours * 3600


def test_same_key_with_another_body_is_refused(api: SpecClient, metric: str,
                                               unchanged) -> None:
    (X1, y1), (X2, y2) = iris_batches(2, seed=5)
    assert api.post(URL, json=records_body(X1, y1), headers=_key("k1")).status_code == 201
    with unchanged():
        resp = api.post(URL, json=records_body(X2, y2), headers=_key("k1"))
        assert_problem(resp, 422, HEADER)
        # the same body under another route is another request too
        resp = api.post(URL + "?allow_duplicate=true", json=records_body(X1, y1),
                        headers=_key("k1"))
        assert_problem(resp, 422, HEADER)


def test_keys_are_scoped_to_the_token_and_the_metric(api: SpecClient, app,
                                                     metric: str) -> None:
    X, y = iris_batches(1, seed=6)[0]
    stored = api.post(URL, json=records_body(X, y), headers=_key("shared")).get_json()
    # another token with the same key and body is a new request: it runs, and the
    # content check finds the batch already stored
    etl = SpecClient(app, ETL_TOKEN)
    dup = etl.post(URL, json=records_body(X, y), headers=_key("shared"))
    assert_problem(dup, 409)
    assert dup.get_json()["batch_id"] == stored["batch_id"]
    assert "Answer-Replayed" not in dup.headers
    # another metric with the same key is a new request as well
    assert api.put("/v1/metrics/iris2", json={"features": IRIS_FEATURES}).status_code == 201
    other = api.post("/v1/metrics/iris2/batches", json=records_body(X, y),
                     headers=_key("shared"))
    assert other.status_code == 201 and other.get_json()["batch_id"] != stored["batch_id"]


def test_a_failed_request_keeps_nothing(api: SpecClient, metric: str) -> None:
    X, y = iris_batches(1, seed=7)[0]
    bad = records_body(X, y)
    bad["groups"] = bad["groups"][:-1]  # one label short
    assert_problem(api.post(URL, json=bad, headers=_key("k2")), 422, "groups")
    fixed = api.post(URL, json=records_body(X, y), headers=_key("k2"))
    assert fixed.status_code == 201 and "Answer-Replayed" not in fixed.headers


def test_a_key_still_held_by_a_running_request_is_a_conflict(api: SpecClient, ctx: Context,
                                                             metric: str, unchanged) -> None:
    X, y = iris_batches(1, seed=8)[0]
    raw = json.dumps(records_body(X, y)).encode()
    send = dict(data=raw, content_type="application/json", headers=_key("k3"))
    # hold the slot as a first request in flight would (same principal, metric, key)
    digest, asked = slot("admin", "iris", "k3"), fingerprint("POST", URL, b"", raw)
    assert ctx.storage.idempotency.claim(digest, asked, 60) is None
    with unchanged():
        assert_problem(api.post(URL, **send), 409)
    ctx.storage.idempotency.release(digest, asked)
    assert api.post(URL, **send).status_code == 201


def test_malformed_keys_are_refused(api: SpecClient, metric: str, unchanged) -> None:
    X, y = iris_batches(1, seed=9)[0]
    with unchanged():
        for key in ("has space", "x" * 256, "é"):
            resp = api.post(URL, json=records_body(X, y),
                            headers={HEADER: key.encode("utf-8").decode("latin-1")})
            assert_problem(resp, 422, HEADER)


def test_fits_activations_and_metrics_replay(api: SpecClient, ctx: Context,
                                             with_batches: list[str], run_worker_burst) -> None:
    a = api.post("/v1/metrics/iris/fits", json={"method": "diagonal"}, headers=_key("f"))
    b = api.post("/v1/metrics/iris/fits", json={"method": "diagonal"}, headers=_key("f"))
    assert a.status_code == b.status_code == 202
    assert a.get_json()["fit_id"] == b.get_json()["fit_id"]
    assert b.headers["Answer-Replayed"] == "true"
    assert ctx.queue.count == 1
    run_worker_burst(ctx, max_jobs=2)
    second = api.post("/v1/metrics/iris/fits", json={"method": "euclidean",
                                                     "activate": "by_hand"})
    run_worker_burst(ctx, max_jobs=2)
    v2 = api.get(second.headers["Location"]).get_json()["version"]
    roll = {"version": v2, "reason": "compare"}
    r1 = api.put("/v1/metrics/iris/active", json=roll, headers=_key("act-1"))
    r2 = api.put("/v1/metrics/iris/active", json=roll, headers=_key("act-1"))
    assert r1.status_code == r2.status_code == 200 and r1.get_json() == r2.get_json()
    history = api.get("/v1/metrics/iris/history").get_json()["history"]
    assert [(h["from"], h["to"]) for h in history] == [(None, 1), (1, v2)]
    m1 = api.put("/v1/metrics/fresh", json={"features": ["a"]}, headers=_key("m"))
    m2 = api.put("/v1/metrics/fresh", json={"features": ["a"]}, headers=_key("m"))
    assert m1.status_code == m2.status_code == 201 and m1.get_json() == m2.get_json()


def test_32_producers_with_resends_store_each_batch_once(app, ctx: Context,
                                                         metric: str) -> None:
    """32 concurrent producers × 50 batches; 10 % are sent a second time with the same
    key (a client that timed out), and every tenth of those also without a key."""
    X_all, y_all = load_open("iris")
    rng = np.random.default_rng(11)
    producers, per = 32, 50
    plan = [make_batches(X_all, y_all, per, rng, classes_per_batch=(2, 3),
                         group_size=(3, 8), disjoint=False) for _ in range(producers)]
    answers: dict[tuple[int, int], list[Any]] = {}
    failures: list[str] = []

    def produce(p: int) -> None:
        client = SpecClient(app, ADMIN_TOKEN)
        for i, (X, y) in enumerate(plan[p]):
            body, key = records_body(X, y), _key(f"producer-{p}/batch-{i}")
            sends = 2 if i % 10 == 3 else 1
            got = []
            for _ in range(sends):
                resp = client.post(URL, json=body, headers=key)
                got.append((resp.status_code, resp.get_json()))
            if i % 25 == 3:  # a resend without its key: refused by the content check
                resp = client.post(URL, json=body)
                got.append((resp.status_code, resp.get_json()))
            answers[(p, i)] = got

    threads = [threading.Thread(target=lambda p=p: _guard(produce, p, failures))
               for p in range(producers)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=300)
    assert not any(t.is_alive() for t in threads) and failures == []

    stored_ids = set()
    for got in answers.values():
        status, first = got[0]
        assert status == 201, first
        stored_ids.add(first["batch_id"])
        for status, body in got[1:]:
            if "status" in body:  # the keyless resend
                assert status == 409 and body["batch_id"] == first["batch_id"]
            else:
                assert (status, body) == (201, first)
    assert len(stored_ids) == producers * per == 1600
    m = ctx.storage.metrics.counts("iris")
    assert m["batches"] == 1600
    assert m["records"] == sum(len(X) for batches in plan for X, _ in batches)
    rows = load_training_data(ctx, "iris")
    assert {r["meta"]["batch_id"] for r in rows} == stored_ids
    summed = BatchStats.sum(r["stats"] for r in rows)
    expected = BatchStats.sum(BatchStats.from_batch(X, y) for b in plan for X, y in b)
    assert summed.n_batches == expected.n_batches == 1600
    assert summed.allclose(expected, rtol=1e-9, atol=1e-9)
    assert_allclose(summed.sums, expected.sums, rtol=1e-12)


def _guard(fn, p: int, failures: list[str]) -> None:
    try:
        fn(p)
    except BaseException as exc:  # noqa: BLE001 — reported by the main thread
        failures.append(f"producer {p}: {exc!r}")
