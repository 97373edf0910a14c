"""Storage: atomic visibility, prefix isolation, statistics retraction (real Redis)."""

from __future__ import annotations

import dataclasses
import json
import threading

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from service.context import Context
from service.core import BatchStats
from service.errors import Conflict, NotFound
from service.lifecycle import Fit, FitStatus
from service.store import ActiveChanged, DuplicateBatch, MissingMetric, StaleAttempt, Storage
from service.usecases import batches, metrics, versions
from service.usecases.batches import load_training_data
from service.usecases.params import fit_status, version_number
from service.usecases.params import reason as parse_reason

from ._data import as_table, open_batches, setup_metric, table_of


def _doc(n: int) -> dict:
    return {"summary": {"version": n, "method": "euclidean", "alpha": 0.0, "rank": 1},
            "report": {"n": n}, "metric": {"m": n}, "batches": [], "parent": None}


def _running(storage: Storage, fit_id: str, uid: str) -> Fit:
    """A fit record in state running under job ``job-<fit_id>``, as a worker leaves it."""
    fit = Fit(fit_id=fit_id, metric="m", metric_uid=uid, params={}, requested_by="t",
              job_id=f"job-{fit_id}", dedupe_key=storage.fits.dedupe_key("m", fit_id),
              created_at="now", created_ts=0.0)
    storage.fits.create(fit, enqueue=lambda pipe: None)
    return storage.fits.change(fit_id, lambda f: f.start())


def test_version_commit_is_all_or_nothing(ctx: Context) -> None:
    metrics.put_metric(ctx, "m", ["a", "b"])
    st = ctx.storage
    uid = st.metrics.get("m")["uid"]
    running = _running(st, "f1", uid)
    n = st.versions.next_number("m")
    done = running.succeed(n, {"activated": True, "reason": "test"})
    common = dict(activate=True, activation={"to": n}, fit=done)
    # a stale decision (active changed), a re-created metric and an attempt that no
    # longer owns the fit all leave no trace
    with pytest.raises(ActiveChanged):
        st.versions.commit("m", uid, n, _doc(n), expected_active=7, **common)
    with pytest.raises(MissingMetric):
        st.versions.commit("m", "other-uid", n, _doc(n), expected_active=None, **common)
    stale = dataclasses.replace(done, job_id="job-of-an-older-attempt")
    with pytest.raises(StaleAttempt):
        st.versions.commit("m", uid, n, _doc(n), expected_active=None, activate=True,
                           activation={"to": n}, fit=stale)
    assert st.versions.numbers("m") == []
    assert st.versions.get("m", n) is None
    assert st.versions.active("m") is None and st.versions.history("m") == []
    assert st.fits.get("f1").status is FitStatus.RUNNING
    assert st.fits.live_ids() == ["f1"]

    st.versions.commit("m", uid, n, _doc(n), expected_active=None, **common)
    assert st.versions.numbers("m") == [n]
    assert st.versions.get("m", n)["report"] == {"n": n}
    assert st.versions.active("m") == n and st.versions.history("m") == [{"to": n}]
    assert st.fits.get("f1").status is FitStatus.SUCCEEDED
    # a finished fit leaves the live set and frees its dedupe slot
    assert st.fits.live_ids() == []
    assert st.fits.dedupe_holder(st.fits.dedupe_key("m", "f1")) is None


def test_reader_never_sees_a_partial_version(ctx: Context) -> None:
    """A MULTI reader checks version hash, version index, active pointer and fit record
    together while versions are committed: all four must agree at every read."""
    metrics.put_metric(ctx, "m", ["a"])
    st = ctx.storage
    uid = st.metrics.get("m")["uid"]
    done = threading.Event()
    seen: list[tuple] = []
    k = st.keys

    def reader() -> None:
        conn = st.redis
        while not done.is_set():
            for n in range(1, 31):
                with conn.pipeline(transaction=True) as pipe:
                    pipe.exists(k.version("m", n))
                    pipe.zscore(k.version_index("m"), str(n))
                    pipe.get(k.active("m"))
                    pipe.hget(k.fit(f"f{n}"), "status")
                    seen.append((n, *pipe.execute()))

    thread = threading.Thread(target=reader)
    thread.start()
    try:
        for i in range(1, 31):
            running = _running(st, f"f{i}", uid)
            n = st.versions.next_number("m")
            st.versions.commit("m", uid, n, _doc(n), expected_active=st.versions.active("m"),
                               activate=True, activation={"to": n},
                               fit=running.succeed(n, {"activated": True, "reason": "t"}))
    finally:
        done.set()
        thread.join(timeout=30)
    assert not thread.is_alive()
    assert len(seen) > 30
    for n, exists, score, active, status in seen:
        visible = bool(exists)
        assert visible == (score is not None)
        assert visible == (status == b'"succeeded"')
        # versions are committed in order and each is activated: version n is visible
        # exactly when the active pointer has reached it
        assert visible == (active is not None and int(active) >= n)


def test_two_prefixes_share_a_redis_without_seeing_each_other(ctx: Context) -> None:
    other = Context.build(ctx.settings.replace(key_prefix=ctx.settings.key_prefix + "-b"))
    try:
        assert other.settings.queue_name != ctx.settings.queue_name
        setup_metric(ctx, "shared", n=2)
        metrics.put_metric(other, "shared", ["only"], "second deployment")
        assert metrics.get_metric(ctx, "shared")["batches"] == 2
        assert metrics.get_metric(other, "shared")["features"] == ["only"]
        assert metrics.get_metric(other, "shared")["batches"] == 0
        metrics.delete_metric(other, "shared")
        assert metrics.list_metrics(other) == {"metrics": [], "next_cursor": None}
        assert metrics.get_metric(ctx, "shared")["records"] > 0
        assert [m["name"] for m in metrics.list_metrics(ctx)["metrics"]] == ["shared"]
    finally:
        for key in other.redis.scan_iter(match=other.settings.key_prefix + ":*"):
            other.redis.delete(key)
        other.close()


def test_batches_round_trip_and_stats_are_stored_as_bytes(ctx: Context) -> None:
    feats, data, ids = setup_metric(ctx, "m", n=3)
    rows = load_training_data(ctx, "m")
    assert [r["meta"]["batch_id"] for r in rows] == ids
    for row, (X, y) in zip(rows, data, strict=True):
        assert_array_equal(row["X"], X)
        assert row["labels"] == [int(v) for v in y]
        expected = BatchStats.from_batch(X, y)
        assert row["stats"].allclose(expected, rtol=1e-12, atol=1e-12)
    raw = ctx.redis.hget(ctx.storage.keys.batch("m", ids[0]), "stats")
    assert raw == BatchStats.from_batch(*data[0]).to_bytes()


def test_removing_a_batch_retracts_its_statistics(ctx: Context) -> None:
    feats, data, ids = setup_metric(ctx, "m", n=3)
    total = BatchStats.sum(BatchStats.from_batch(X, y) for X, y in data)
    stored = BatchStats.sum(r["stats"] for r in load_training_data(ctx, "m"))
    assert stored.allclose(total)
    batches.delete_batch(ctx, "m", ids[1])
    remaining = BatchStats.sum(r["stats"] for r in load_training_data(ctx, "m"))
    assert remaining.allclose(total - BatchStats.from_batch(*data[1]))
    assert remaining.n_batches == 2
    m = metrics.get_metric(ctx, "m")
    assert m["batches"] == 2
    assert m["records"] == len(data[0][0]) + len(data[2][0])
    with pytest.raises(NotFound):
        batches.get_batch(ctx, "m", ids[1])


def test_both_table_forms_give_the_same_batch(ctx: Context) -> None:
    feats, data = open_batches("iris", 1)
    X, y = data[0]
    metrics.put_metric(ctx, "m", feats)
    labels = y.tolist()
    reversed_cols = table_of({"columns": feats[::-1], "rows": X[:, ::-1].tolist()}, labels)
    records = table_of({"records": [dict(zip(feats, row, strict=True))
                                    for row in X.tolist()]}, labels)
    a = batches.add_batch(ctx, "m", as_table(feats, X, labels))
    # the same content again is refused, naming the stored batch, unless allowed
    with pytest.raises(DuplicateBatch) as dup:
        batches.add_batch(ctx, "m", reversed_cols)
    assert dup.value.batch_id == a["batch_id"]
    b = batches.add_batch(ctx, "m", reversed_cols, allow_duplicate=True)
    c = batches.add_batch(ctx, "m", records, allow_duplicate=True)
    assert a["sha256"] == b["sha256"] == c["sha256"]
    assert len({a["batch_id"], b["batch_id"], c["batch_id"]}) == 3
    got = batches.get_batch(ctx, "m", a["batch_id"])
    sizes = {str(k): int(v) for k, v in zip(*np.unique(y, return_counts=True), strict=True)}
    assert got["group_sizes"] == sizes and got["records"] == len(X)
    rows = load_training_data(ctx, "m")
    assert_allclose(rows[1]["X"], X)


def test_activation_of_a_missing_version_changes_nothing(ctx: Context) -> None:
    metrics.put_metric(ctx, "m", ["a"])
    with pytest.raises(NotFound):
        versions.activate(ctx, "m", version_number(3), parse_reason("roll back"), "admin")
    assert ctx.storage.versions.active("m") is None
    assert versions.history(ctx, "m") == {"history": [], "next_cursor": None}


def test_feature_change_with_batches_is_a_conflict(ctx: Context) -> None:
    feats, _, _ = setup_metric(ctx, "m", n=1)
    with pytest.raises(Conflict) as err:
        metrics.put_metric(ctx, "m", feats[:2])
    assert err.value.status == 409
    assert metrics.get_metric(ctx, "m")["features"] == feats


def test_matrices_stored_in_the_old_zlib_format_still_load(ctx: Context) -> None:
    # the format before Zstandard, written out by hand: header (magic LWM1, rows,
    # columns) and little-endian float64, as one zlib stream at level 6
    import struct
    import zlib

    feats, data, ids = setup_metric(ctx, "m", n=2)
    X = data[0][0]
    raw = struct.pack("<4sqq", b"LWM1", *X.shape) + np.ascontiguousarray(X, "<f8").tobytes()
    key = ctx.storage.keys.batch("m", ids[0])
    assert ctx.redis.hget(key, "matrix")[:4] == b"\x28\xb5\x2f\xfd"  # stored now: Zstandard
    ctx.redis.hset(key, "matrix", zlib.compress(raw, 6))
    rows = load_training_data(ctx, "m")
    assert_array_equal(rows[0]["X"], X)
    assert_array_equal(rows[1]["X"], data[1][0])


def test_fit_records_stored_under_former_names_read_under_ours(ctx: Context) -> None:
    # a record as stored before the activation policies were renamed
    fit = Fit(fit_id="a" * 20, metric="m", metric_uid="u", params={"activate": "never"},
              requested_by="t", job_id="job-a", dedupe_key=None, created_at="now",
              created_ts=0.0)
    record = fit.to_record()
    ctx.redis.hset(ctx.storage.keys.fit(fit.fit_id), mapping={
        k: json.dumps(v) for k, v in record.items()})
    got = ctx.storage.fits.get(fit.fit_id)
    assert got is not None and got.params["activate"] == "by_hand"
    for former, now in (("if_better", "when_better"), ("always", "at_once")):
        ctx.redis.hset(ctx.storage.keys.fit(fit.fit_id), "params",
                       json.dumps({"activate": former}))
        assert ctx.storage.fits.get(fit.fit_id).params == {"activate": now}


def test_fit_records_stored_with_the_former_waiting_status_read_as_waiting(
    ctx: Context,
) -> None:
    from service.usecases import fits as fit_uc

    feats, _, _ = setup_metric(ctx, "m", n=2)
    uid = ctx.storage.metrics.get("m")["uid"]
    fit = Fit(fit_id="b" * 20, metric="m", metric_uid=uid, params={"activate": "if_better"},
              requested_by="t", job_id="job-b", dedupe_key=ctx.storage.fits.dedupe_key("m", "h"),
              created_at="now", created_ts=1.0)
    ctx.storage.fits.create(fit, enqueue=lambda pipe: None)
    # as a record was written before ``waiting`` had its name
    ctx.redis.hset(ctx.storage.keys.fit(fit.fit_id), mapping={
        "status": json.dumps("queued"), "stage": json.dumps("queued")})
    shown = fit_uc.get_fit(ctx, fit.fit_id)
    assert (shown["status"], shown["stage"]) == ("waiting", "waiting")
    assert shown["params"]["activate"] == "when_better"
    waiting = fit_uc.list_fits(ctx, status=fit_status("waiting"))["fits"]
    assert [f["fit_id"] for f in waiting] == [fit.fit_id]
    assert ctx.storage.fits.get(fit.fit_id).live
    # the dedupe check reads the raw status too: the old record still holds its slot
    again = dataclasses.replace(fit, fit_id="c" * 20)
    assert ctx.storage.fits.create(again, enqueue=lambda pipe: None) == (fit.fit_id, False)
    # and it moves on under our names
    moved = ctx.storage.fits.change(fit.fit_id, lambda f: f.start())
    assert moved is not None and moved.status is FitStatus.RUNNING
