"""Drift watch against the held-out reference, end to end (fits through a real worker).

Data: wine (Forina et al.), as bundled with scikit-learn, split by class into two
disjoint halves (``tests/datasets.split_pool``): five labelled batches of one half
(each holding every class) train the version, the other half is grouped live:
records from the training distribution that were never in the training set, as live
records are. A shift of two standard
deviations in one feature is the drift to flag.
"""

from __future__ import annotations

import numpy as np

from service.context import Context
from service.store.codecs import pack_json, unpack_json
from service.usecases import batches, drift, fits, groupings, metrics
from service.usecases.params import FitParams
from tests.datasets import load_open, split_pool

from ._data import as_table

SHIFTED = "x6"  # wine's flavanoids column


def _setup(ctx: Context, run_worker_burst, names: list[str]):
    X, y = load_open("wine")
    rng = np.random.default_rng(7)
    (Xf, yf), (Xl, _) = split_pool(X, y, rng)
    # the training half dealt into five batches, every class in each (so the training
    # batches hold the classes in the proportions the live half does)
    parts = [np.array_split(rng.permutation(np.flatnonzero(yf == c)), 5) for c in range(3)]
    data = [(Xf[np.concatenate(p)], yf[np.concatenate(p)]) for p in zip(*parts, strict=True)]
    feats = [f"x{i}" for i in range(X.shape[1])]
    for name in names:
        metrics.put_metric(ctx, name, feats)
        for Xb, yb in data:
            batches.add_batch(ctx, name, as_table(feats, Xb, [int(v) for v in yb]))
    ids = [fits.request_fit(ctx, n, FitParams.parse({}), "admin")[0]["fit_id"] for n in names]
    run_worker_burst(ctx)
    for f in ids:
        assert fits.get_fit(ctx, f)["status"] == "succeeded"
    return feats, np.vstack([Xb for Xb, _ in data]), Xl[rng.permutation(len(Xl))]


def _group(ctx: Context, name: str, feats: list[str], X: np.ndarray, size: int = 30) -> None:
    for start in range(0, len(X), size):
        groupings.group(ctx, name, as_table(feats, X[start:start + size]), k=3)


def test_unseen_records_stay_steady_against_the_held_out_reference_and_a_shift_is_flagged(
        ctx: Context, run_worker_burst) -> None:
    feats, pool, live = _setup(ctx, run_worker_burst, ["calm", "moved"])
    _group(ctx, "calm", feats, live)
    calm = drift.report(ctx, "calm")
    assert calm["records"] == len(live) and calm["reference_records"] == len(pool)
    # five batches: every one held out once (leave one batch out), all in the reference
    assert calm["reference_heldout_batches"] == 5
    assert calm["margins"]["reference"] == calm["distances"]["reference"] == "held_out"
    assert calm["verdict"] == "steady" and calm["flagged"] == [], calm["features"]

    j = feats.index(SHIFTED)
    moved = live.copy()
    moved[:, j] += 2 * pool[:, j].std()
    _group(ctx, "moved", feats, moved)
    out = drift.report(ctx, "moved")
    assert out["margins"]["reference"] == "held_out"
    assert out["flagged"] == [SHIFTED] and out["verdict"] == "drifted", out["features"]

    # the console's panel plots live margins against the held-out reference, with the
    # in-sample one beside it
    hist = drift.margin_histogram(ctx, "calm", 1)
    assert hist["reference_kind"] == "held_out" and hist["records"] == len(live)
    for key in ("live", "reference", "in_sample"):
        assert len(hist[key]) == len(hist["edges"]) and abs(sum(hist[key]) - 1) < 1e-9
    assert hist["reference"] != hist["in_sample"]


def test_a_reference_stored_before_held_out_margins_still_gives_a_verdict(
        ctx: Context, run_worker_burst) -> None:
    feats, _, live = _setup(ctx, run_worker_burst, ["old"])
    _group(ctx, "old", feats, live)
    new = drift.report(ctx, "old")
    key = ctx.storage.keys.drift_reference("old", 1)
    ref = unpack_json(ctx.redis.get(key))
    del ref["heldout"]  # the format versions fitted before this change were stored in
    ctx.redis.set(key, pack_json(ref))
    ctx.cache.clear()
    out = drift.report(ctx, "old")  # the same live buckets, the old reference
    assert out["verdict"] == "steady" and out["records"] == len(live)
    assert out["margins"]["reference"] == out["distances"]["reference"] == "in_sample"
    assert out["reference_heldout_batches"] is None
    assert out["margins"]["verdict"] in {"steady", "shifting", "drifted"}
    assert out["features"] == new["features"]
    # on records the version never saw, the held-out margins are the closer reference
    assert new["margins"]["psi"] < out["margins"]["psi"]
    hist = drift.margin_histogram(ctx, "old", 1)
    assert hist["reference_kind"] == "in_sample" and hist["reference"] == hist["in_sample"]
