"""Every list is paged: ``limit`` and an opaque ``cursor``; ``next_cursor`` null at the
end. Walking every page yields each item exactly once, in order, even while items are
added between pages."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

import pytest

from service.context import Context
from service.lifecycle import Fit
from service.usecases.fits import DEFAULTS

from .helpers import IRIS_FEATURES, assert_problem, iris_batches, post_batches
from .spec import SpecClient


def _walk(api: SpecClient, url: str, key: str, limit: int,
          between: Callable[[int], None] | None = None) -> list[dict[str, Any]]:
    """Every page of ``url``; ``between(i)`` runs after page i (to add items)."""
    items, cursor, i = [], None, 0
    sep = "&" if "?" in url else "?"
    while True:
        query = f"{sep}limit={limit}" + (f"&cursor={cursor}" if cursor else "")
        body = api.get(url + query).get_json()
        assert len(body[key]) <= limit
        items += body[key]
        cursor = body["next_cursor"]
        if cursor is None:
            return items
        assert body[key], "a page before the end is never empty"
        if between is not None:
            between(i)
        i += 1


def test_metrics_page_by_name_under_inserts(api: SpecClient) -> None:
    names = [f"m{i:02d}" for i in range(7)]
    for n in names:
        api.put(f"/v1/metrics/{n}", json={"features": ["a"]})
    everything = api.get("/v1/metrics").get_json()
    assert [m["name"] for m in everything["metrics"]] == names
    assert everything["next_cursor"] is None

    def add(i: int) -> None:  # one before the cursor, one after
        api.put(f"/v1/metrics/a{i}", json={"features": ["a"]})
        api.put(f"/v1/metrics/z{i}", json={"features": ["a"]})

    seen = [m["name"] for m in _walk(api, "/v1/metrics", "metrics", 3, add)]
    assert len(seen) == len(set(seen))
    assert [n for n in seen if n.startswith("m")] == names  # each once, in order
    assert seen == sorted(seen)


def test_batches_page_in_ingest_order_under_inserts(api: SpecClient, metric: str) -> None:
    ids = post_batches(api, metric, iris_batches(5))
    extra = iris_batches(4, seed=1)

    def add(i: int) -> None:
        post_batches(api, metric, [extra[i]])

    seen = [b["batch_id"] for b in _walk(api, f"/v1/metrics/{metric}/batches", "batches",
                                         2, add)]
    assert seen[:5] == ids and len(seen) == len(set(seen))
    assert api.get(f"/v1/metrics/{metric}/batches?limit=1").get_json()["next_cursor"]


def _versions(ctx: Context, name: str, numbers: list[int]) -> None:
    """Visible versions, written as a fit's commit leaves them (summaries only)."""
    k = ctx.storage.keys
    for n in numbers:
        ctx.redis.hset(k.version(name, n), mapping={"summary": json.dumps({
            "version": n, "created_at": "2026-01-01T00:00:00Z", "method": "euclidean",
            "alpha": 0.0, "rank": 4, "score": dict.fromkeys(
                ("ari", "nmi", "rand", "baseline_ari", "baseline_nmi", "baseline_rand"),
                0.5),
            "beats_baseline": False})})
        ctx.redis.zadd(k.version_index(name), {str(n): n})


def test_versions_and_history_page_under_inserts(
    api: SpecClient, ctx: Context, metric: str
) -> None:
    _versions(ctx, metric, [1, 2, 3, 5, 6])  # a crashed fit leaves gaps
    got = _walk(api, f"/v1/metrics/{metric}/versions", "versions", 2,
                lambda i: _versions(ctx, metric, [7 + i]))
    assert [v["version"] for v in got][:5] == [1, 2, 3, 5, 6]
    assert len(got) == len({v["version"] for v in got})

    for n in (1, 2, 3, 1, 2):
        api.put(f"/v1/metrics/{metric}/active", json={"version": n, "reason": f"to {n}"})
    before = api.get(f"/v1/metrics/{metric}/history").get_json()["history"]
    got = _walk(api, f"/v1/metrics/{metric}/history", "history", 2,
                lambda i: api.put(f"/v1/metrics/{metric}/active",
                                  json={"version": 5, "reason": f"more {i}"}))
    assert [h["reason"] for h in before] == ["to 1", "to 2", "to 3", "to 1", "to 2"]
    assert got[:5] == before  # each once, in order; those added come after
    assert [h["reason"] for h in got[5:]] == [f"more {i}" for i in range(len(got) - 5)]


def _fits(ctx: Context, name: str, stamps: list[float]) -> list[str]:
    uid = ctx.storage.metrics.get(name)["uid"]
    ids = []
    for i, ts in enumerate(stamps):
        fit_id = f"{i:02d}" + "f" * 18
        fit = Fit(fit_id=fit_id, metric=name, metric_uid=uid, params=dict(DEFAULTS),
                  requested_by="t",
                  job_id=f"job-{fit_id}", dedupe_key=ctx.storage.fits.dedupe_key(name, fit_id),
                  created_at="2026-01-01T00:00:00Z", created_ts=ts)
        ctx.storage.fits.create(fit, enqueue=lambda pipe: None)
        ids.append(fit_id)
    return ids


def test_fits_page_newest_first_ties_broken_by_id(
    api: SpecClient, ctx: Context, metric: str
) -> None:
    api.put("/v1/metrics/other", json={"features": IRIS_FEATURES})
    ids = _fits(ctx, metric, [1.0, 2.0, 2.0, 2.0, 3.5, 4.0])  # three created at once
    newest_first = sorted(zip([1.0, 2.0, 2.0, 2.0, 3.5, 4.0], ids, strict=True),
                          reverse=True)
    expected = [f for _, f in newest_first]
    assert [f["fit_id"] for f in api.get("/v1/fits").get_json()["fits"]] == expected
    for limit in (1, 2, 4):
        got = _walk(api, "/v1/fits", "fits", limit)
        assert [f["fit_id"] for f in got] == expected
    # fits created during the walk are newer: they come before the cursor, never twice
    later = iter([10.0, 11.0, 12.0, 13.0, 14.0, 15.0])
    added: list[str] = []

    def add(i: int) -> None:
        uid = ctx.storage.metrics.get("other")["uid"]
        fit_id = f"{90 + i:02d}" + "e" * 18
        ctx.storage.fits.create(Fit(
            fit_id=fit_id, metric="other", metric_uid=uid, params=dict(DEFAULTS), requested_by="t",
            job_id=f"job-{fit_id}", dedupe_key=ctx.storage.fits.dedupe_key("other", fit_id),
            created_at="now", created_ts=next(later)), enqueue=lambda pipe: None)
        added.append(fit_id)

    got = [f["fit_id"] for f in _walk(api, "/v1/fits", "fits", 2, add)]
    assert got == expected and added
    # a status filter pages too (every one of these fits is waiting)
    got = _walk(api, f"/v1/fits?metric={metric}&status=waiting", "fits", 4)
    assert [f["fit_id"] for f in got] == expected
    assert api.get("/v1/fits?status=failed&limit=1").get_json() == {
        "fits": [], "next_cursor": None}


LISTS = ["/v1/metrics", "/v1/metrics/iris/batches", "/v1/metrics/iris/versions",
         "/v1/metrics/iris/history", "/v1/fits"]


@pytest.mark.parametrize("url", LISTS)
@pytest.mark.parametrize(("query", "field"), [
    ("limit=0", "limit"), ("limit=501", "limit"), ("limit=ten", "limit"),
    ("limit=1.5", "limit"), ("cursor=", "cursor"), ("cursor=%%%", "cursor"),
    ("cursor=bm90LWpzb24", "cursor"),  # base64 of "not-json"
    ("cursor=" + "A" * 513, "cursor"),
])
def test_bad_limit_or_cursor_is_422_naming_it(
    api: SpecClient, metric: str, unchanged, url: str, query: str, field: str
) -> None:
    with unchanged():
        assert_problem(api.get(f"{url}?{query}"), 422, field)


@pytest.mark.parametrize("url", LISTS)
def test_a_cursor_of_another_list_is_422(api: SpecClient, ctx: Context, metric: str,
                                         url: str) -> None:
    api.put("/v1/metrics/other", json={"features": ["a"]})
    post_batches(api, metric, iris_batches(2))
    _versions(ctx, metric, [1, 2])
    _versions(ctx, "other", [1, 2])
    api.put(f"/v1/metrics/{metric}/active", json={"version": 1})
    api.put(f"/v1/metrics/{metric}/active", json={"version": 2})
    _fits(ctx, metric, [1.0, 2.0])
    cursors = {u: api.get(f"{u}?limit=1").get_json()["next_cursor"] for u in LISTS}
    assert all(cursors.values())
    for other, cursor in cursors.items():
        resp = api.get(f"{url}?limit=1&cursor={cursor}")
        if other == url:
            assert resp.status_code == 200
        else:
            assert_problem(resp, 422, "cursor")
    # nor is a batches cursor of one metric valid for another's batches
    assert_problem(api.get(f"/v1/metrics/other/versions?cursor="
                           f"{cursors['/v1/metrics/iris/versions']}"), 422, "cursor")
