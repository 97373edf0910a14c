"""Groupings: version choice, the in-process cache following activations, errors.

Data: wine (Forina et al.) as bundled with scikit-learn.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from sklearn.metrics import adjusted_rand_score

from service.context import Context
from service.core import FittedMetric
from service.errors import Conflict, InvalidInput, NotFound
from service.usecases import batches, fits, groupings, metrics, versions
from service.usecases.params import FitParams, group_count, version_number
from service.usecases.params import reason as parse_reason

from ._data import as_table, open_batches, setup_metric, table_of


def _fit(ctx: Context, run_worker_burst, params: dict) -> int:
    f, _ = fits.request_fit(ctx, "m", FitParams.parse(params), "admin")
    run_worker_burst(ctx)
    out = fits.get_fit(ctx, f["fit_id"])
    assert out["status"] == "succeeded", out
    return out["version"]


def test_grouping_follows_activation(ctx: Context, run_worker_burst) -> None:
    feats, _, _ = setup_metric(ctx, "m", dataset="wine", n=4)
    _, (held_out,) = open_batches("wine", 1, seed=99)
    X, y = held_out
    table = as_table(feats, X)
    assert _fit(ctx, run_worker_burst, {"activate": "by_hand"}) == 1
    with pytest.raises(Conflict):  # versions exist, none active
        groupings.group(ctx, "m", table, k=group_count(3))
    explicit = groupings.group(ctx, "m", table, k=group_count(len(set(y.tolist()))),
                               version=version_number(1))
    assert explicit["version"] == 1
    versions.activate(ctx, "m", version_number(1), parse_reason("first look"), "admin")
    assert _fit(ctx, run_worker_burst, {"method": "euclidean", "activate": "at_once"}) == 2

    other = Context.build(ctx.settings)  # a second process: its own cache
    try:
        k = len(set(y.tolist()))
        g2 = groupings.group(ctx, "m", table, k=group_count(k))
        again = groupings.group(other, "m", table, k=group_count(k))
        assert g2["version"] == 2 and again["version"] == 2
        versions.activate(other, "m", version_number(1), parse_reason("roll back"), "etl")
        g1 = groupings.group(ctx, "m", table, k=group_count(k))
        assert g1["version"] == 1
        assert g1["labels"] == explicit["labels"] and g1["sizes"] == explicit["sizes"]
        uid = metrics.get_metric(ctx, "m") and ctx.storage.metrics.get("m")["uid"]
        assert ctx.cache.get(("m", uid, 1)) is not None and ctx.cache.get(("m", uid, 2))
        assert len(g1["labels"]) == len(g1["distances"]) == len(g1["margins"]) == len(X)
        assert sum(g1["sizes"]) == len(X) and g1["k"] == k and not g1["k_chosen"]
        # distances and margins are those of the records mapped by version 1 to the
        # centres of their groups (k-means centres are their groups' means)
        v1 = FittedMetric.from_dict(versions.get_version(ctx, "m", version_number(1))["metric"])
        Z, lab = v1.transform(X), np.asarray(g1["labels"])
        centres = np.stack([Z[lab == j].mean(axis=0) for j in range(k)])
        d = np.linalg.norm(Z[:, None, :] - centres[None, :, :], axis=2)
        assert_allclose(g1["distances"], d[np.arange(len(Z)), lab], rtol=1e-6, atol=1e-9)
        runner_up = np.sort(d, axis=1)[:, 1]
        assert_allclose(g1["margins"], runner_up - d[np.arange(len(Z)), lab],
                        rtol=1e-6, atol=1e-9)
        # label-invariant agreement with the true classes (sanity bound, common practice)
        assert adjusted_rand_score(y, g1["labels"]) > 0.5
        auto = groupings.group(ctx, "m", table, k=group_count("auto"))
        assert auto["k_chosen"] and 1 <= auto["k"] <= 10
        moves = [(h["from"], h["to"], h["who"]) for h in versions.history(ctx, "m")["history"]]
        assert moves == [(None, 1, "admin"), (1, 2, "admin"), (2, 1, "etl")]
    finally:
        other.close()


def test_grouping_errors(ctx: Context, run_worker_burst) -> None:
    feats, data, _ = setup_metric(ctx, "m", n=2)
    _fit(ctx, run_worker_burst, {"method": "diagonal"})
    table = as_table(feats, data[0][0])
    for bad in [0, -2, 2.5, True, "three"]:  # k's own rule (the schemas run it too)
        with pytest.raises(InvalidInput) as err:
            group_count(bad)
        assert err.value.errors[0]["field"] == "k"
    with pytest.raises(InvalidInput) as err:  # more groups than records
        groupings.group(ctx, "m", table_of({"columns": feats, "rows": [[1.0] * len(feats)]}),
                        k=group_count(2))
    assert err.value.errors[0]["field"] == "k"
    big = Context.build(ctx.settings.replace(max_groups=3), connection=ctx.redis)
    with pytest.raises(InvalidInput) as err:  # the deployment's cap, checked by the use case
        groupings.group(big, "m", table, k=group_count(4))
    assert err.value.errors[0]["field"] == "k" and "LIKEWISE_MAX_GROUPS" in err.value.detail
    with pytest.raises(InvalidInput) as err:
        groupings.group(ctx, "m", table_of({"columns": feats[:-1], "rows": [[1.0] * 3]}),
                        k=group_count(1))
    assert err.value.errors[0]["field"] == "columns"
    with pytest.raises(NotFound):
        groupings.group(ctx, "m", table, k=group_count(2), version=version_number(9))
    with pytest.raises(InvalidInput):
        version_number("1")
    assert len(ctx.cache) == 1  # version 1, loaded once; failures cached nothing else


def test_grouping_reads_columns_in_the_versions_feature_order(
        ctx: Context, run_worker_burst) -> None:
    """A version keeps the features it was fitted on: after the metric's features are
    reordered (allowed once its batches are gone) records still map to the right
    columns, and a renamed feature is refused instead of silently misread."""
    feats, data, ids = setup_metric(ctx, "m", n=2)
    _fit(ctx, run_worker_burst, {"method": "diagonal"})
    X = data[0][0]
    before = groupings.group(ctx, "m", as_table(feats, X), k=group_count(2))
    for batch_id in ids:
        batches.delete_batch(ctx, "m", batch_id)
    metrics.put_metric(ctx, "m", list(reversed(feats)))
    ctx.cache.clear()
    after = groupings.group(ctx, "m", as_table(feats, X), k=group_count(2))
    assert after["labels"] == before["labels"] and after["distances"] == before["distances"]
    metrics.put_metric(ctx, "m", [*feats[:-1], "renamed"])
    with pytest.raises(InvalidInput) as err:
        groupings.group(ctx, "m", as_table([*feats[:-1], "renamed"], X), k=group_count(2))
    assert err.value.errors[0]["field"] == "columns"
