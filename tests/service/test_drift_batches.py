"""Drift summaries a process holds back and writes in batches (``usecases.drift``).

Data: wine (Forina et al.), as bundled with scikit-learn, split into labelled batches
by ``tests/datasets.py``; live records are drawn from the training batches. The
stored moments are checked against numpy's mean and population variance of the
same records.
"""

from __future__ import annotations

import os

import numpy as np
import pytest

from service.context import Context
from service.usecases import drift, fits, groupings
from service.usecases.backlog import BACKLOG
from service.usecases.params import FitParams, group_count

from ._data import as_table, setup_metric


def _fitted(ctx: Context, run_worker_burst, name: str) -> tuple[list[str], np.ndarray]:
    feats, data, _ = setup_metric(ctx, name, dataset="wine", n=4)
    fit = fits.request_fit(ctx, name, FitParams.parse({}), "admin")[0]
    run_worker_burst(ctx)
    assert fits.get_fit(ctx, fit["fit_id"])["status"] == "succeeded"
    pool = np.vstack([Xb for Xb, _ in data])
    return feats, pool[np.random.default_rng(3).choice(len(pool), 120, replace=False)]


def _buckets(ctx: Context, name: str) -> list[dict[str, str]]:
    keys = ctx.redis.scan_iter(match=ctx.storage.keys.metric(name, "drift", "*"))
    return [{k.decode(): v.decode() for k, v in ctx.redis.hgetall(key).items()} for key in keys]


def test_summaries_are_held_back_then_written_once_with_every_request_counted(
        ctx: Context, run_worker_burst, monkeypatch: pytest.MonkeyPatch) -> None:
    feats, live = _fitted(ctx, run_worker_burst, "held")
    assert BACKLOG.flush()
    monkeypatch.setattr(drift, "WRITE_SECONDS", 3600.0)  # none falls due in this test
    for start in range(0, len(live), 40):
        groupings.group(ctx, "held", as_table(feats, live[start:start + 40]),
                        k=group_count(3))
    assert BACKLOG.flush(hooks=False)  # summarised and merged, not written yet
    assert _buckets(ctx, "held") == []
    assert BACKLOG.flush()  # a flush writes what is held back
    (bucket,) = _buckets(ctx, "held")
    assert (int(bucket["requests"]), int(bucket["n"])) == (3, 120)
    mean = np.array(bucket["mean"].split(","), dtype=float)
    m2 = np.array(bucket["m2"].split(","), dtype=float)
    np.testing.assert_allclose(mean, live.mean(axis=0), rtol=1e-12)  # numpy
    np.testing.assert_allclose(m2 / 120, live.var(axis=0), rtol=1e-9)  # numpy, ddof=0
    report = drift.report(ctx, "held")
    assert (report["records"], report["requests"]) == (120, 3)


def test_summaries_fall_due_and_a_forked_child_leaves_its_parents_alone(
        ctx: Context, run_worker_burst, monkeypatch: pytest.MonkeyPatch) -> None:
    feats, live = _fitted(ctx, run_worker_burst, "due")
    assert BACKLOG.flush()
    monkeypatch.setattr(drift, "WRITE_SECONDS", 0.0)  # every summary is due at once
    groupings.group(ctx, "due", as_table(feats, live[:40]), k=group_count(3))
    assert BACKLOG.flush(hooks=False)  # written by the job itself, no flush hook needed
    assert [int(b["requests"]) for b in _buckets(ctx, "due")] == [1]
    monkeypatch.setattr(drift, "WRITE_SECONDS", 3600.0)
    groupings.group(ctx, "due", as_table(feats, live[40:80]), k=group_count(3))
    assert BACKLOG.flush(hooks=False)  # held back in this process
    pid = os.fork()
    if pid == 0:  # the child: what it inherited is the parent's to write
        try:
            drift._HELD.write_all()
        finally:
            os._exit(0)
    assert os.waitpid(pid, 0)[1] == 0
    assert [int(b["requests"]) for b in _buckets(ctx, "due")] == [1]
    assert BACKLOG.flush()
    assert [int(b["requests"]) for b in _buckets(ctx, "due")] == [2]


def test_the_timer_falls_due_with_the_oldest_bucket_held() -> None:
    """A bucket is held at most WRITE_SECONDS: the timer waits for the oldest one, not
    a full period from whenever it was last armed."""
    import time

    buckets = drift._Buckets()
    now = time.monotonic()
    held = buckets._mine()
    held[("a",)] = drift._Held(None, None, 1, 0, now - 0.3)  # type: ignore[arg-type]
    held[("b",)] = drift._Held(None, None, 1, 0, now - 0.1)  # type: ignore[arg-type]
    with buckets._lock:
        buckets._arm(now)
    timer = buckets._timer
    assert timer is not None
    timer.cancel()
    assert timer.interval == pytest.approx(drift.WRITE_SECONDS - 0.3)
