"""Grouping runs (``…/grouping-runs``): large tables grouped by a real worker, read back
by pages, equal to the synchronous grouping of the same records.

Records: iris (Fisher 1936) as scikit-learn bundles it, all 150 of them; the metric is
fitted on iris batches by a real worker (the ``fitted`` fixture). Chunks are made
small here (``CHUNK_ROWS``) so a run of 150 records spans several of them.
"""

from __future__ import annotations

import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.ipc as pa_ipc
import pyarrow.parquet as pq
import pytest

from service.context import Context
from service.run_lifecycle import RunStatus
from service.usecases import grouping_runs, warden
from service.usecases.backlog import BACKLOG
from tests.datasets import load_open

from .helpers import IRIS_FEATURES, as_records, assert_problem
from .spec import SpecClient

ROOT = Path(__file__).resolve().parents[2]
RUNS = "/v1/metrics/iris/grouping-runs"
ARROW = "application/vnd.apache.arrow.stream"
PARQUET = "application/vnd.apache.parquet"


@pytest.fixture(autouse=True)
def small_chunks(monkeypatch: pytest.MonkeyPatch) -> None:
    # forked work horses inherit it; runs record their own chunk size anyway
    monkeypatch.setattr(grouping_runs, "CHUNK_ROWS", 64)


@pytest.fixture
def iris() -> tuple[np.ndarray, list[dict[str, Any]]]:
    """All of iris (scikit-learn's copy), as records with an ``id`` column."""
    X, _ = load_open("iris")
    records = [{**r, "id": f"iris-{i}"} for i, r in enumerate(as_records(X))]
    return X, records


def _arrow(X: np.ndarray, ids: list[str] | None = None) -> pa.Table:
    cols = {f: X[:, j] for j, f in enumerate(IRIS_FEATURES)}
    if ids is not None:
        cols["id"] = ids
    return pa.table(cols)


def _stream(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    with pa_ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue()


def _all_pages(api: SpecClient, location: str, limit: int) -> tuple[dict[str, list], int]:
    out: dict[str, list] = {"labels": [], "distances": [], "margins": [], "ids": []}
    cursor, pages = None, 0
    while True:
        query = f"?limit={limit}" + (f"&cursor={cursor}" if cursor else "")
        page = api.get(f"{location}/results{query}").get_json()
        assert page["start"] == len(out["labels"])
        for key in out:
            out[key] += page.get(key, [])
        pages += 1
        cursor = page["next_cursor"]
        if cursor is None:
            return out, pages


def _start(api: SpecClient, body: dict[str, Any]) -> str:
    """Start a run of records that carry an ``id``; its Location."""
    resp = api.post(RUNS + "?id_column=id", json=body)
    assert resp.status_code == 202, resp.get_json()
    return resp.headers["Location"]


def _done(api: SpecClient, ctx: Context, run_worker_burst, location: str) -> dict[str, Any]:
    run_worker_burst(ctx, max_jobs=5)
    run = api.get(location).get_json()
    assert run["status"] == "done", (run["error"], run)
    return run


def test_a_run_answers_what_a_grouping_answers(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, iris
) -> None:
    X, records = iris
    resp = api.post(f"{RUNS}?id_column=id", json={"records": records, "k": 3})
    assert resp.status_code == 202, resp.get_json()
    accepted = resp.get_json()
    location = resp.headers["Location"]
    assert location == f"{RUNS}/{accepted['run_id']}"
    assert (accepted["status"], accepted["version"], accepted["k"]) == ("waiting", 1, 3)
    assert accepted["n_records"] == 150 and accepted["has_ids"] is True
    assert api.get(f"{location}/results").status_code == 409  # not done yet
    run = _done(api, ctx, run_worker_burst, location)
    assert run["progress"] == 1.0 and run["attempts"] == 1 and run["expires_at"]
    # the synchronous grouping of the same records is the reference
    sync = api.post("/v1/metrics/iris/groupings?id_column=id",
                    json={"records": records, "k": 3}).get_json()
    assert run["outcome"] == {"k": 3, "k_chosen": False, "sizes": sync["sizes"], "imputed": 0}
    got, pages = _all_pages(api, location, limit=40)
    assert pages == 4  # 40 + 40 + 40 + 30: the pages concatenate to the whole
    assert got["labels"] == sync["labels"] and got["ids"] == sync["ids"]
    assert got["distances"] == sync["distances"] and got["margins"] == sync["margins"]
    # retention: the records are gone, the results expire
    rid, keys = accepted["run_id"], ctx.storage.keys
    assert ctx.redis.exists(keys.run_input(rid, 0)) == 0
    ttl = ctx.redis.ttl(keys.run(rid))
    assert 0 < ttl <= ctx.settings.run_result_hours * 3600
    assert 0 < ctx.redis.ttl(keys.run_output(rid, 2)) <= ttl
    assert ctx.storage.runs.live_ids() == []
    # the drift watch counted the run once (one hourly bucket with one request)
    assert BACKLOG.flush()
    buckets = list(ctx.redis.scan_iter(match=keys.metric("iris", "drift", "") + "*"))
    assert len(buckets) == 1


def test_arrow_and_parquet_bodies_and_arrow_pages(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, iris
) -> None:
    X, records = iris
    ids = [r["id"] for r in records]
    stream = api.post(f"{RUNS}?k=3&id_column=id", data=_stream(_arrow(X, ids)),
                      content_type=ARROW)
    sink = io.BytesIO()
    pq.write_table(_arrow(X), sink)
    parquet = api.post(f"{RUNS}?k=3&version=1", data=sink.getvalue(), content_type=PARQUET)
    assert stream.status_code == parquet.status_code == 202
    run_worker_burst(ctx, max_jobs=5)
    sync = api.post("/v1/metrics/iris/groupings", json={"records": as_records(X), "k": 3}
                    ).get_json()
    from_parquet, _ = _all_pages(api, parquet.headers["Location"], limit=65536)
    assert from_parquet["labels"] == sync["labels"] and from_parquet["ids"] == []
    # the Arrow answer: same numbers, the cursor in a header
    location, cursor, tables = stream.headers["Location"], None, []
    while True:
        query = "?limit=100" + (f"&cursor={cursor}" if cursor else "")
        resp = api.get(f"{location}/results{query}", headers={"Accept": ARROW})
        assert resp.mimetype == ARROW
        tables.append(pa_ipc.open_stream(resp.data).read_all())
        cursor = resp.headers.get("Next-Cursor")
        if cursor is None:
            break
    got = pa.concat_tables(tables)
    assert len(tables) == 2 and got.column("record").to_pylist() == list(range(150))
    assert got.column("label").to_pylist() == sync["labels"]
    assert got.column("distance").to_pylist() == sync["distances"]
    assert got.column("id").to_pylist() == ids


@pytest.mark.parametrize("body,query,status,field", [
    ({"records": [{"sepal_length": 1.0}], "k": 2}, "", 422, "records[0]"),
    ({"columns": IRIS_FEATURES, "rows": [[1, 2, 3, "x"]], "k": 1}, "", 422, "rows[0]"),
    ({"columns": IRIS_FEATURES, "rows": [[1, 2, 3, 4], [2, 3, 4, 5]], "k": 3}, "", 422, "k"),
    ({"columns": IRIS_FEATURES, "rows": [[1, 2, 3, 4]], "k": 101}, "", 422, "k"),
    ({"columns": IRIS_FEATURES, "rows": [[1, 2, 3, 4]], "k": 0}, "", 422, "k"),
    ({"columns": IRIS_FEATURES, "rows": [[1, 2, 3, 4]], "version": 9}, "", 404, None),
    ({"columns": IRIS_FEATURES, "rows": [[1, 2, 3, 4]]}, "?id_column=nope", 422, "id_column"),
    ({"columns": IRIS_FEATURES, "rows": [[1e308, 2, 3, 4]], "k": 1}, "", 422, "rows[0]"),
    # in the second chunk (of 64 here): the row is named by its place in the table
    ({"columns": IRIS_FEATURES, "rows": [[1, 2, 3, 4]] * 70 + [[1, 2, 1e308, 4]], "k": 1},
     "", 422, "rows[70]"),
])
def test_a_bad_request_stores_nothing(api: SpecClient, fitted: dict[str, Any], unchanged,
                                      body: dict, query: str, status: int,
                                      field: str | None) -> None:
    with unchanged():
        assert_problem(api.post(RUNS + query, json=body), status, field)


def test_non_finite_and_oversized_tabular_bodies(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], unchanged, iris
) -> None:
    X, _ = iris
    bad = X.copy()
    bad[7, 2] = np.inf
    with unchanged():
        assert_problem(api.post(f"{RUNS}?k=3", data=_stream(_arrow(bad)), content_type=ARROW),
                       422, "petal_length")
        assert_problem(api.post(RUNS, data=b"x", content_type="text/plain"), 415)
        assert_problem(api.post(f"{RUNS}?k=3", data=b"not arrow", content_type=ARROW), 400)
        assert_problem(api.post(RUNS, data=b"{", content_type="application/json"), 400)
    small = create_small_app(ctx)
    with unchanged():
        assert_problem(small.post(f"{RUNS}?k=3", data=_stream(_arrow(X)), content_type=ARROW),
                       413, "body")


def create_small_app(ctx: Context) -> SpecClient:
    """The app with a run cap of 100 records."""
    from service.api import create_app
    from tests.conftest import ADMIN_TOKEN

    small = Context.build(ctx.settings.replace(max_run_records=100), connection=ctx.redis)
    return SpecClient(create_app(context=small), ADMIN_TOKEN)


def test_no_active_version_is_a_conflict(api: SpecClient, metric: str, unchanged) -> None:
    with unchanged():
        assert_problem(api.post(RUNS, json={"columns": IRIS_FEATURES,
                                            "rows": [[1, 2, 3, 4]]}), 409)


def test_pages_refuse_foreign_cursors_and_bad_limits(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, iris
) -> None:
    _, records = iris
    first = api.post(RUNS + "?id_column=id", json={"records": records[:70], "k": 2})
    other = api.post(RUNS + "?id_column=id", json={"records": records[70:], "k": 2})
    first, other = first.headers["Location"], other.headers["Location"]
    run_worker_burst(ctx, max_jobs=5)
    cursor = api.get(f"{first}/results?limit=10").get_json()["next_cursor"]
    assert_problem(api.get(f"{other}/results?cursor={cursor}"), 422, "cursor")
    assert_problem(api.get(f"{first}/results?limit=0"), 422, "limit")
    assert_problem(api.get(f"{first}/results?limit=65537"), 422, "limit")
    assert_problem(api.get(f"{RUNS}/{'0' * 20}"), 404)
    assert_problem(api.get(f"/v1/metrics/other/grouping-runs/{first.rsplit('/', 1)[1]}"), 404)


def test_delete_drops_the_run_and_a_waiting_run_writes_nothing_afterwards(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, iris
) -> None:
    _, records = iris
    location = _start(api, {"records": records, "k": 3})
    run_id = location.rsplit("/", 1)[1]
    assert api.delete(location).status_code == 204
    assert_problem(api.get(location), 404)
    run_worker_burst(ctx, max_jobs=5)  # its job finds nothing to do
    assert list(ctx.redis.scan_iter(match=ctx.storage.keys.run(run_id) + "*")) == []
    assert ctx.storage.runs.live_ids() == []


def test_deleting_the_metric_deletes_its_runs_records_and_results(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, iris
) -> None:
    _, records = iris
    done = _start(api, {"records": records, "k": 3})
    _done(api, ctx, run_worker_burst, done)
    waiting = _start(api, {"records": records[:70], "k": 2})
    ids = [loc.rsplit("/", 1)[1] for loc in (done, waiting)]
    # the metric's index of runs knows when each record expires (+inf while live)
    index = ctx.storage.keys.run_index("iris")
    ends = ctx.redis.zscore(index, ids[0])
    keep = ctx.settings.run_result_hours * 3600
    assert ends is not None and time.time() < ends <= time.time() + keep + 1
    assert ctx.redis.zscore(index, ids[1]) == float("inf")
    assert api.delete("/v1/metrics/iris").status_code == 204
    for loc in (done, waiting):
        assert_problem(api.get(loc), 404)
    run_worker_burst(ctx, max_jobs=5)  # the waiting run's job finds nothing to do
    for run_id in ids:
        assert list(ctx.redis.scan_iter(match=ctx.storage.keys.run(run_id) + "*")) == []
    assert ctx.storage.runs.live_ids() == []
    assert not ctx.redis.exists(ctx.storage.keys.run_index("iris"))


def test_the_index_of_runs_forgets_expired_ones_as_runs_are_created(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, iris
) -> None:
    _, records = iris
    first = _start(api, {"records": records[:70], "k": 2})
    _done(api, ctx, run_worker_burst, first)
    index = ctx.storage.keys.run_index("iris")
    old = first.rsplit("/", 1)[1]
    ctx.redis.zadd(index, {old: time.time() - 1})  # as if its record had expired
    second = _start(api, {"records": records[:70], "k": 2}).rsplit("/", 1)[1]
    assert [m.decode() for m in ctx.redis.zrange(index, 0, -1)] == [second]


def test_idempotency_key_replays_the_acceptance(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], iris
) -> None:
    _, records = iris
    body = {"records": records[:20], "k": 2}
    first = api.post(RUNS + "?id_column=id", json=body, headers={"Idempotency-Key": "run-1"})
    again = api.post(RUNS + "?id_column=id", json=body, headers={"Idempotency-Key": "run-1"})
    assert first.status_code == again.status_code == 202
    assert again.headers["Answer-Replayed"] == "true"
    assert again.get_json()["run_id"] == first.get_json()["run_id"]
    assert len(ctx.storage.runs.live_ids()) == 1


def test_the_version_is_pinned_at_request_time(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], fit_to_version, run_worker_burst,
    iris
) -> None:
    _, records = iris
    location = _start(api, {"records": records, "k": 3})
    later = fit_to_version("iris", activate="at_once", method="diagonal")  # runs the run too
    assert later["version"] == 2 and api.get("/v1/metrics/iris").status_code == 200
    run = _done(api, ctx, run_worker_burst, location)
    assert run["version"] == 1
    sync = api.post("/v1/metrics/iris/groupings?id_column=id",
                    json={"records": records, "k": 3, "version": 1}).get_json()
    got, _ = _all_pages(api, location, limit=500)
    assert got["labels"] == sync["labels"] and got["distances"] == sync["distances"]


def test_a_run_whose_worker_died_is_grouped_by_another(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, iris
) -> None:
    """What a worker killed mid-run leaves behind: the run says grouping, its attempt's
    lease has lapsed (never renewed), its job is no longer served. The warden hands the
    run to a new job, which another worker groups to the same answer."""
    _, records = iris
    location = _start(api, {"records": records, "k": 3})
    run_id = location.rsplit("/", 1)[1]
    before = ctx.storage.runs.get(run_id)
    died = ctx.storage.runs.change(run_id, lambda r: r.begin())  # began, then the kill
    assert died is not None and died.status is RunStatus.GROUPING
    assert ctx.storage.runs.lease_holder(run_id) is None
    assert warden.sweep(ctx) == 1
    handed = ctx.storage.runs.get(run_id)
    assert handed.status is RunStatus.WAITING and handed.job_id != before.job_id
    assert "stopped" in handed.error
    run = _done(api, ctx, run_worker_burst, location)
    assert run["attempts"] == 2
    sync = api.post("/v1/metrics/iris/groupings?id_column=id",
                    json={"records": records, "k": 3}).get_json()
    got, _ = _all_pages(api, location, limit=500)
    assert got["labels"] == sync["labels"]


def test_a_run_with_no_attempts_left_fails_and_drops_its_records(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], iris
) -> None:
    _, records = iris
    location = _start(api, {"records": records[:10], "k": 2})
    run_id = location.rsplit("/", 1)[1]
    for _ in range(ctx.settings.fit_retries + 1):  # every attempt began and died
        ctx.storage.runs.change(run_id, lambda r: r.begin())
        warden.sweep(ctx)
    run = api.get(location).get_json()
    assert run["status"] == "failed" and "attempts" in run["error"] and run["expires_at"]
    assert ctx.redis.exists(ctx.storage.keys.run_input(run_id, 0)) == 0
    assert_problem(api.get(f"{location}/results"), 409)


def test_ids_of_mixed_types_come_back_as_posted_and_as_text_in_arrow(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, iris
) -> None:
    _, records = iris
    mixed = [{**r, "id": i if i % 2 else f"r{i}"} for i, r in enumerate(records[:10])]
    location = _start(api, {"records": mixed, "k": 2})
    _done(api, ctx, run_worker_burst, location)
    got, _ = _all_pages(api, location, limit=10)
    assert got["ids"] == [r["id"] for r in mixed]
    resp = api.get(f"{location}/results", headers={"Accept": ARROW})
    ids = pa_ipc.open_stream(resp.data).read_all().column("id").to_pylist()
    assert ids == [str(r["id"]) for r in mixed]


def test_a_killed_work_horse_hands_the_run_to_a_new_job(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, monkeypatch, iris
) -> None:
    """The forked work horse dies by SIGKILL in its first grouping only; the queue
    fails its job, the warden's sweep (at the end of the burst here, every
    ``warden_seconds`` in a long-running worker) gives the run a new job, and the next
    worker groups it."""
    _, records = iris
    marker = ctx.storage.key("test", "horse-killed")
    original = grouping_runs.group_records

    def die_once(*args: Any, **kwargs: Any) -> Any:
        if ctx.redis.incr(marker) == 1:
            os.kill(os.getpid(), signal.SIGKILL)
        return original(*args, **kwargs)

    monkeypatch.setattr(grouping_runs, "group_records", die_once)
    location = _start(api, {"records": records, "k": 3})
    run_worker_burst(ctx, max_jobs=5)
    waiting = api.get(location).get_json()
    assert waiting["status"] == "waiting" and "terminated" in waiting["error"], waiting
    run = _done(api, ctx, run_worker_burst, location)
    assert run["attempts"] == 2 and int(ctx.redis.get(marker)) == 2


WORKER_SCRIPT = """
import os, signal, sys
from service.config import Settings
from service.usecases import grouping_runs
from workers.worker import run_worker
grouping_runs.group_records = lambda *a, **k: os.kill(os.getpid(), signal.SIGKILL)
run_worker(Settings.from_env(), burst=True, name=sys.argv[1], simple=True)
"""


def test_a_worker_killed_mid_run_is_healed_by_the_warden(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, iris
) -> None:
    """A worker process dies by SIGKILL while grouping. Its lease lapses
    (``lease_seconds``); the warden's sweep gives the run a new job, which another
    worker completes with the answer a grouping gives."""
    _, records = iris
    c = Context.build(ctx.settings.replace(lease_seconds=1), connection=ctx.redis)
    location = _start(api, {"records": records, "k": 3})
    run_id = location.rsplit("/", 1)[1]
    s = c.settings
    env = {**os.environ, "PYTHONPATH": str(ROOT), "LIKEWISE_REDIS_URL": s.redis_url,
           "LIKEWISE_KEY_PREFIX": s.key_prefix, "LIKEWISE_QUEUE": s.queue_name,
           "LIKEWISE_LEASE_SECONDS": "1"}
    proc = subprocess.run([sys.executable, "-c", WORKER_SCRIPT, f"{s.key_prefix}-dying"],
                          env=env, cwd=ROOT, timeout=120, capture_output=True)
    assert proc.returncode == -signal.SIGKILL, proc.stderr.decode()[-2000:]
    assert api.get(location).get_json()["status"] == "grouping"  # reads never write
    first_job = c.storage.runs.get(run_id).job_id
    deadline = time.monotonic() + 10  # the lease lapses within its TTL (bounded wait)
    while c.storage.runs.lease_holder(run_id) is not None:
        assert time.monotonic() < deadline, "the dead attempt's lease did not lapse"
        time.sleep(0.1)
    assert warden.sweep(c) == 1
    assert c.storage.runs.get(run_id).job_id != first_job
    run = _done(api, ctx, run_worker_burst, location)
    assert run["attempts"] == 2
    sync = api.post("/v1/metrics/iris/groupings?id_column=id",
                    json={"records": records, "k": 3}).get_json()
    got, _ = _all_pages(api, location, limit=500)
    assert got["labels"] == sync["labels"] and got["ids"] == sync["ids"]


def test_an_unexpected_error_is_retried_then_fails_the_run(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], run_worker_burst, monkeypatch, iris
) -> None:
    """An exception in the job (not bad data: that was refused at the POST) gives the
    run another attempt through the queue's failure callback, up to ``fit_retries``."""
    _, records = iris
    marker = ctx.storage.key("test", "raised")
    original = grouping_runs.group_records

    def raise_once(*args: Any, **kwargs: Any) -> Any:
        if ctx.redis.incr(marker) == 1:
            raise RuntimeError("the disk was full")
        return original(*args, **kwargs)

    monkeypatch.setattr(grouping_runs, "group_records", raise_once)
    first = _start(api, {"records": records, "k": 3})
    assert _done(api, ctx, run_worker_burst, first)["attempts"] == 2  # one burst
    monkeypatch.setattr(grouping_runs, "group_records",
                        lambda *a, **k: (_ for _ in ()).throw(RuntimeError("still full")))
    second = _start(api, {"records": records, "k": 3})
    run_worker_burst(ctx, max_jobs=5)
    run = api.get(second).get_json()
    assert run["status"] == "failed" and "still full" in run["error"], run
    assert run["attempts"] == ctx.settings.fit_retries + 1
