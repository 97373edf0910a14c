"""Use cases: every error path gives the right status and field, and stores nothing."""

from __future__ import annotations

import pytest

from service.context import Context
from service.errors import Conflict, InvalidInput, NotFound, PayloadTooLarge, ServiceError
from service.tables import from_json
from service.usecases import batches, fits, groupings, metrics, versions
from service.usecases.params import (
    FitParams,
    description,
    feature_names,
    fit_status,
    group_count,
    metric_name,
    version_number,
)
from service.usecases.params import reason as parse_reason

from ._data import as_table, setup_metric, table_of


def _post_batch(ctx: Context, name: str, body, groups):
    """A batch as the API takes it: the body parsed at the edge, then the use case."""
    s = ctx.settings
    table = from_json(body, s.max_batch_records, s.max_batch_bytes)
    return batches.add_batch(ctx, name, table.with_groups(groups))


def _raises(exc_type: type[ServiceError], status: int, field: str | None, fn, *args, **kw):
    with pytest.raises(exc_type) as err:
        fn(*args, **kw)
    assert err.value.status == status
    if field is not None:
        assert [e["field"] for e in err.value.errors] == [field], err.value.errors
    body = err.value.to_problem("/x")
    assert body["status"] == status and body["type"].endswith(err.value.slug)
    return err.value


def _nothing_stored(ctx: Context, name: str = "m", n_batches: int = 0) -> None:
    m = metrics.get_metric(ctx, name)
    assert (m["batches"], m["versions"], m["active_version"]) == (n_batches, 0, None)
    assert fits.list_fits(ctx, name) == {"fits": [], "next_cursor": None}
    assert ctx.queue.count == 0


# ---- metrics -------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["", "Upper", "has space", "a" * 65, "dot.name", "ü", 5])
def test_metric_name_rule(ctx: Context, name) -> None:
    _raises(InvalidInput, 422, "name", metrics.put_metric, ctx, name, ["a"])
    assert metrics.list_metrics(ctx) == {"metrics": [], "next_cursor": None}


@pytest.mark.parametrize("features,field", [
    ([], "features"), ("a", "features"), (["a", "a"], "features"),
    (["a", 3], "features[1]"), ([" a"], "features[0]"), (["a\nb"], "features[0]"),
])
def test_metric_features_are_validated(features, field) -> None:
    _raises(InvalidInput, 422, field, feature_names, features)  # the schema's rule


def test_too_many_features_and_long_description(ctx: Context) -> None:
    too_many = [f"f{i}" for i in range(ctx.settings.max_batch_features + 1)]
    _raises(InvalidInput, 422, "features", metrics.put_metric, ctx, "m", too_many)
    _raises(InvalidInput, 422, "description", description, "x" * 2001)
    assert metrics.list_metrics(ctx) == {"metrics": [], "next_cursor": None}


def test_put_metric_created_unchanged_updated(ctx: Context) -> None:
    first, created = metrics.put_metric(ctx, "m", ["a", "b"], "one")
    assert created and first["batches"] == 0 and first["active_version"] is None
    again, created = metrics.put_metric(ctx, "m", ["a", "b"], "one")
    assert not created and again == first
    changed, created = metrics.put_metric(ctx, "m", ["b", "a"], "two")
    assert not created and changed["features"] == ["b", "a"] and changed["description"] == "two"
    assert metrics.get_metric(ctx, "m") == changed


def test_missing_metric_is_404_everywhere(ctx: Context) -> None:
    table = {"columns": ["a"], "rows": [[1.0], [2.0]]}
    for fn, args in [
        (metrics.get_metric, ()), (metrics.delete_metric, ()),
        (_post_batch, (table, [0, 1])), (batches.list_batches, ()),
        (batches.get_batch, ("0" * 16,)), (batches.delete_batch, ("0" * 16,)),
        (fits.request_fit, (FitParams(), "admin")), (versions.list_versions, ()),
        (versions.get_version, (version_number(1),)),
        (versions.activate, (version_number(1), parse_reason("r"), "admin")),
        (versions.history, ()), (groupings.group, (table_of(table),)),
    ]:
        _raises(NotFound, 404, None, fn, ctx, "nope", *args)
    _raises(NotFound, 404, None, fits.list_fits, ctx, "nope")
    assert metrics.list_metrics(ctx) == {"metrics": [], "next_cursor": None}


def test_delete_metric_removes_every_key(ctx: Context) -> None:
    setup_metric(ctx, "m", n=2)
    fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    metrics.delete_metric(ctx, "m")
    assert list(ctx.redis.scan_iter(match=ctx.settings.key_prefix + ":metric:*")) == []
    assert ctx.storage.fits.ids(metric_names=["m"]) == [] and ctx.storage.fits.live_ids() == []
    _raises(NotFound, 404, None, metrics.get_metric, ctx, "m")


# ---- batches -------------------------------------------------------------------------
BAD_TABLES = [
    ({"columns": ["a", "c"], "rows": [[1, 2], [3, 4]]}, "columns"),
    ({"columns": ["a", "b", "b"], "rows": [[1, 2, 2], [3, 4, 4]]}, "columns"),
    ({"columns": ["a", "b"]}, "rows"),
    ({"rows": [[1, 2], [3, 4]]}, "columns"),
    ({"columns": ["a", "b"], "rows": [[1, 2], [3]]}, "rows[1]"),
    ({"columns": ["a", "b"], "rows": [[1, 2], [3, "4"]]}, "rows[1]"),
    ({"columns": ["a", "b"], "rows": [[1, 2], [3, None]]}, "rows[1]"),
    ({"columns": ["a", "b"], "rows": [[1, True], [3, 4]]}, "rows[0]"),
    ({"columns": ["a", "b"], "rows": [[1, 2], [float("inf"), 4]]}, "rows[1]"),
    ({"columns": ["a", "b"], "rows": []}, "rows"),
    ({"records": [{"a": 1, "b": 2}, {"a": 3}]}, "records[1]"),
    ({"records": [{"a": 1, "b": 2}, {"a": 3, "b": 4, "c": 5}]}, "records[1]"),
    ({"records": [{"a": 1, "b": 2}, [3, 4]]}, "records[1]"),
    ({"records": [{"a": 1, "b": 2}, {"a": 3, "b": "x"}]}, "records[1]"),
    ({"records": []}, "records"),
    ({"records": [{"a": 1, "b": 2}], "rows": [[1, 2]], "columns": ["a", "b"]}, "records"),
    ({}, "records"),
]


@pytest.mark.parametrize("table,field", BAD_TABLES)
def test_bad_tables_are_422_with_the_field(ctx: Context, table, field) -> None:
    metrics.put_metric(ctx, "m", ["a", "b"])
    _raises(InvalidInput, 422, field, _post_batch, ctx, "m", table, [0, 1])
    _nothing_stored(ctx)


@pytest.mark.parametrize("groups", [[0], [0, 1, 1, 0], "01", [0, 0, 0], [0, "a", 1], [0.5, 1, 2],
                                    [None, 1, 2], ["x" * 201, "a", "b"]])
def test_bad_groups_are_422(ctx: Context, groups) -> None:
    metrics.put_metric(ctx, "m", ["a", "b"])
    table = {"columns": ["a", "b"], "rows": [[1, 2], [3, 4], [5, 7]]}
    _raises(InvalidInput, 422, "groups", _post_batch, ctx, "m", table, groups)
    _nothing_stored(ctx)


def test_batch_size_caps_are_413(ctx: Context) -> None:
    small = ctx.settings.replace(max_batch_records=3, max_batch_bytes=8 * 2 * 4)
    c2 = Context(small, ctx.redis, ctx.storage, ctx.queue, ctx.cache)
    metrics.put_metric(c2, "m", ["a", "b"])
    rows = [[float(i), float(i % 2)] for i in range(4)]
    _raises(PayloadTooLarge, 413, "rows", _post_batch, c2, "m",
            {"columns": ["a", "b"], "rows": rows}, [0, 1, 0, 1])
    records = [{"a": r[0], "b": r[1]} for r in rows]
    _raises(PayloadTooLarge, 413, "records", _post_batch, c2, "m",
            {"records": records}, [0, 1, 0, 1])
    c3 = Context(ctx.settings.replace(max_batch_bytes=8 * 2 * 2), ctx.redis, ctx.storage,
                 ctx.queue, ctx.cache)
    _raises(PayloadTooLarge, 413, "rows", _post_batch, c3, "m",
            {"columns": ["a", "b"], "rows": rows[:3]}, [0, 1, 0])
    _nothing_stored(c2)


def test_unknown_batch_ids_are_404(ctx: Context) -> None:
    _, _, ids = setup_metric(ctx, "m", n=1)
    for bad in ["0" * 16, "not-hex", ids[0] + "0", 7]:
        _raises(NotFound, 404, None, batches.get_batch, ctx, "m", bad)
        _raises(NotFound, 404, None, batches.delete_batch, ctx, "m", bad)
    assert [b["batch_id"] for b in batches.list_batches(ctx, "m")["batches"]] == ids


# ---- fits ----------------------------------------------------------------------------
@pytest.mark.parametrize("params,field", [
    ({"method": "best"}, "method"), ({"activate": "maybe"}, "activate"),
    ({"alphas": []}, "alphas"), ({"alphas": [0.1, -1]}, "alphas[1]"),
    ({"alphas": [True]}, "alphas[0]"), ({"alphas": "0.1"}, "alphas"),
    ({"n_folds": 1}, "n_folds"), ({"n_folds": 2.5}, "n_folds"),
    ({"max_rank": 0}, "max_rank"), ({"k_max": 1}, "k_max"), ({"seed": -1}, "seed"),
    ({"colour": "red"}, "colour"),
])
def test_bad_fit_params_are_422(params, field) -> None:
    # the rules the fit schema runs (a request_fit only ever sees FitParams)
    _raises(InvalidInput, 422, field, FitParams.parse, params)


def test_fit_params_are_canonical() -> None:
    p = FitParams.parse({"alphas": [3, 1, 1.0], "seed": None, "max_rank": None})
    assert p == FitParams(alphas=(1.0, 3.0), seed=0)  # null: the default, where allowed
    assert p.as_dict() == {"method": "auto", "activate": "when_better", "alphas": [1.0, 3.0],
                           "n_folds": 5, "max_rank": None, "k_max": 10, "seed": 0}


def test_fit_needs_two_batches(ctx: Context) -> None:
    setup_metric(ctx, "m", n=1)
    _raises(Conflict, 409, None, fits.request_fit, ctx, "m", FitParams(), "admin")
    _nothing_stored(ctx, n_batches=1)


def test_fit_lookups(ctx: Context) -> None:
    for bad in ["0" * 20, "nope", None]:
        _raises(NotFound, 404, None, fits.get_fit, ctx, bad)
        _raises(NotFound, 404, None, fits.retry_fit, ctx, bad, "admin")
    _raises(InvalidInput, 422, "status", fit_status, "done")
    setup_metric(ctx, "m", n=2)
    fit, created = fits.request_fit(ctx, "m", FitParams.parse({"method": "euclidean"}), "etl")
    assert created and fit["status"] == "waiting" and fit["requested_by"] == "etl"
    _raises(Conflict, 409, None, fits.retry_fit, ctx, fit["fit_id"], "admin")
    assert fits.list_fits(ctx, status=fit_status("waiting"))["fits"] == [fit]
    assert fits.list_fits(ctx, metric_name("m"), fit_status("failed")) == {
        "fits": [], "next_cursor": None}
    assert ctx.queue.count == 1


# ---- versions and groupings without a fit ------------------------------------------
def test_versions_and_groupings_before_any_fit(ctx: Context) -> None:
    feats, data, _ = setup_metric(ctx, "m", n=2)
    assert versions.list_versions(ctx, "m") == {"versions": [], "next_cursor": None}
    one = version_number(1)
    _raises(NotFound, 404, None, versions.get_version, ctx, "m", one)
    for bad in [0, -1, "1", True, None]:  # the rules the schemas and views run
        _raises(InvalidInput, 422, "version", version_number, bad)
    for bad in [5, None, "x" * 1001]:
        _raises(InvalidInput, 422, "reason", parse_reason, bad)
    _raises(NotFound, 404, None, versions.activate, ctx, "m", one, parse_reason("r"), "admin")
    table = as_table(feats, data[0][0])
    _raises(Conflict, 409, None, groupings.group, ctx, "m", table)
    _raises(Conflict, 409, None, groupings.group, ctx, "m", table, group_count("auto"))
    _raises(NotFound, 404, None, groupings.group, ctx, "m", table, group_count(2), one)
    assert versions.history(ctx, "m") == {"history": [], "next_cursor": None}
    assert metrics.get_metric(ctx, "m")["active_version"] is None

