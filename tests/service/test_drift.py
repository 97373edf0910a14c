"""Drift watch end to end: fits through a real worker, groupings, verdicts.

Data: wine (Forina et al.), as bundled with scikit-learn, split into labelled batches
by ``tests/datasets.py``. Live records are drawn from the training batches' own
records, so "steady" is the truth for them; a shift of two standard deviations in one
feature is the drift to flag.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.context import Context
from service.errors import Conflict, InvalidInput, NotFound
from service.usecases import drift, fits, groupings, metrics
from service.usecases.backlog import BACKLOG
from service.usecases.params import FitParams, group_count, moment, version_number

from ._data import as_table, setup_metric

SHIFTED = "x6"  # wine's flavanoids column


def _fit_all(ctx: Context, run_worker_burst, names: list[str]) -> None:
    ids = [fits.request_fit(ctx, n, FitParams.parse({}), "admin")[0]["fit_id"] for n in names]
    run_worker_burst(ctx)
    for f in ids:
        out = fits.get_fit(ctx, f)
        assert out["status"] == "succeeded", out


def _group_in_requests(ctx: Context, name: str, feats: list[str], X: np.ndarray,
                       size: int = 40) -> None:
    for start in range(0, len(X), size):
        groupings.group(ctx, name, as_table(feats, X[start:start + size]), k=group_count(3))


def test_steady_records_stay_steady_and_a_shifted_feature_is_flagged_by_name(
        ctx: Context, run_worker_burst) -> None:
    feats, data, _ = setup_metric(ctx, "calm", dataset="wine", n=4)
    setup_metric(ctx, "moved", dataset="wine", n=4)
    _fit_all(ctx, run_worker_burst, ["calm", "moved"])
    pool = np.vstack([Xb for Xb, _ in data])
    rng = np.random.default_rng(5)
    live = pool[rng.choice(len(pool), size=120, replace=False)]

    assert drift.report(ctx, "calm")["verdict"] == "quiet"  # nothing grouped yet
    _group_in_requests(ctx, "calm", feats, live)
    calm = drift.report(ctx, "calm")
    assert calm["records"] == 120 and calm["requests"] == 3 and calm["hours"] >= 1
    assert calm["reference_records"] == len(pool)
    assert calm["verdict"] == "steady" and calm["flagged"] == [], calm["features"]
    assert set(calm["features"]) == set(feats)
    assert calm["margins"]["verdict"] in {"steady", "shifting", "drifted"}

    j = feats.index(SHIFTED)
    moved = live.copy()
    moved[:, j] += 2 * pool[:, j].std()
    _group_in_requests(ctx, "moved", feats, moved)
    out = drift.report(ctx, "moved")
    assert out["flagged"] == [SHIFTED] and out["verdict"] == "drifted", out["features"]
    assert out["features"][SHIFTED]["mean_shift"] == pytest.approx(2.0, abs=0.4)
    assert all(out["features"][f]["verdict"] == "steady" for f in feats if f != SHIFTED)

    assert drift.latest_verdicts(ctx) == {
        "calm": {"version": 1, "verdict": "steady", "records": 120, "flagged": []},
        "moved": {"version": 1, "verdict": "drifted", "records": 120, "flagged": [SHIFTED]},
    }
    # the same report with an explicit version and a since within the hour
    again = drift.report(ctx, "moved", version=1, since=moment(out["until"]))
    assert again["records"] == 120 and again["flagged"] == [SHIFTED]


def test_references_live_with_their_versions_and_errors_name_the_field(
        ctx: Context, run_worker_burst) -> None:
    feats, data, _ = setup_metric(ctx, "m", dataset="iris", n=3)
    with pytest.raises(Conflict):  # no active version
        drift.report(ctx, "m")
    _fit_all(ctx, run_worker_burst, ["m"])
    keys = ctx.storage.keys
    assert ctx.redis.exists(keys.drift_reference("m", 1))
    for bad in ["yesterday", 3, "2999-01-01T00:00:00Z", "2024-05-01T08:00:00Z" + " " * 60]:
        with pytest.raises(InvalidInput) as err:  # the rule the drift query's schema runs
            moment(bad)
        assert err.value.errors[0]["field"] == "since"
    with pytest.raises(NotFound):
        drift.report(ctx, "m", version=version_number(7))
    with pytest.raises(InvalidInput):  # the rule the drift query's schema runs
        version_number(0)
    # a version without a reference (fitted before drift watch): nothing recorded, 409
    ctx.redis.delete(keys.drift_reference("m", 1))
    ctx.cache.clear()
    groupings.group(ctx, "m", as_table(feats, data[0][0]), k=group_count(2))
    assert BACKLOG.flush()  # the summary would be written after the answer
    assert not list(ctx.redis.scan_iter(match=keys.metric("m", "drift", "*")))
    with pytest.raises(Conflict):
        drift.report(ctx, "m")
    assert drift.latest_verdicts(ctx)["m"]["verdict"] is None
    # deleting the metric deletes its references; buckets expire on their own
    _fit_all(ctx, run_worker_burst, ["m"])
    groupings.group(ctx, "m", as_table(feats, data[0][0]), k=group_count(2),
                    version=version_number(2))
    assert BACKLOG.flush()  # its summary is written before the metric is deleted
    assert ctx.redis.exists(keys.drift_reference("m", 2))
    uid = ctx.storage.metrics.get("m")["uid"]
    metrics.delete_metric(ctx, "m")
    left = [k.decode() for k in ctx.redis.scan_iter(match=keys.metric("m", "*"))]
    assert len(left) == 1 and left[0].startswith(keys.metric("m", "drift", uid, 2, ""))
    assert 0 < ctx.redis.ttl(left[0]) <= (ctx.settings.drift_hours + 1) * 3600
