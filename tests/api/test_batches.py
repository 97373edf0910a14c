"""``/v1/metrics/{name}/batches``: both payload forms, list/read/delete, every error path."""

from __future__ import annotations

from collections import Counter

import pytest

from service.api import create_app
from service.context import Context

from .helpers import IRIS_FEATURES, as_records, assert_problem, iris_batches, records_body
from .spec import SpecClient

URL = "/v1/metrics/iris/batches"


@pytest.fixture
def batch():
    """One labelled iris batch (Fisher 1936, scikit-learn's copy)."""
    return iris_batches(1, seed=3)[0]


def test_records_form_then_read_back(api: SpecClient, metric: str, batch) -> None:
    X, labels = batch
    resp = api.post(URL, json=records_body(X, labels))
    assert resp.status_code == 201
    created = resp.get_json()
    assert resp.headers["Location"] == f"{URL}/{created['batch_id']}"
    assert created["records"] == len(X)
    assert created["groups"] == len(set(labels.tolist()))

    listed = api.get(URL).get_json()["batches"]
    assert [b["batch_id"] for b in listed] == [created["batch_id"]]
    detail = api.get(resp.headers["Location"]).get_json()
    expected = {str(k): v for k, v in Counter(labels.tolist()).items()}
    assert detail["group_sizes"] == expected
    metric_now = api.get("/v1/metrics/iris").get_json()
    assert (metric_now["batches"], metric_now["records"]) == (1, len(X))


def test_columns_form_in_any_order_is_the_same_batch(api: SpecClient, metric: str, batch) -> None:
    X, labels = batch
    order = [2, 0, 3, 1]
    by_columns = {
        "columns": [IRIS_FEATURES[j] for j in order],
        "rows": X[:, order].tolist(),
        "groups": [int(v) for v in labels],
    }
    a = api.post(URL, json=records_body(X, labels)).get_json()
    # Same matrix (in the metric's feature order) and labels → same content hash: the
    # second post is refused, naming the stored batch, unless duplicates are allowed.
    dup = api.post(URL, json=by_columns)
    assert dup.status_code == 409 and dup.get_json()["batch_id"] == a["batch_id"]
    assert "allow_duplicate" in dup.get_json()["detail"]
    assert api.get("/v1/metrics/iris").get_json()["batches"] == 1
    b = api.post(URL + "?allow_duplicate=true", json=by_columns)
    assert b.status_code == 201
    assert b.get_json()["sha256"] == a["sha256"]
    assert b.get_json()["batch_id"] != a["batch_id"]


def test_a_kept_copy_still_guards_its_content_after_the_first_is_deleted(
        api: SpecClient, metric: str, batch) -> None:
    X, labels = batch
    body = records_body(X, labels)
    first = api.post(URL, json=body).get_json()
    copy = api.post(URL + "?allow_duplicate=true", json=body).get_json()
    assert api.delete(f"{URL}/{first['batch_id']}").status_code == 204
    # the copy holds the same content: a retry is refused and names the copy
    again = api.post(URL, json=body)
    assert again.status_code == 409 and again.get_json()["batch_id"] == copy["batch_id"]
    assert api.delete(f"{URL}/{copy['batch_id']}").status_code == 204
    # with no copy left the content may be stored again
    assert api.post(URL, json=body).status_code == 201


def test_string_labels_are_accepted(api: SpecClient, metric: str, batch) -> None:
    X, labels = batch
    resp = api.post(URL, json={"records": as_records(X), "groups": [f"g{v}" for v in labels]})
    assert resp.status_code == 201
    sizes = api.get(resp.headers["Location"]).get_json()["group_sizes"]
    assert set(sizes) == {f"g{v}" for v in labels}


def test_delete_batch(api: SpecClient, with_batches: list[str]) -> None:
    before = api.get("/v1/metrics/iris").get_json()
    gone = with_batches[0]
    assert api.delete(f"{URL}/{gone}").status_code == 204
    assert_problem(api.get(f"{URL}/{gone}"), 404)
    after = api.get("/v1/metrics/iris").get_json()
    assert after["batches"] == before["batches"] - 1
    assert after["records"] < before["records"]
    assert gone not in [b["batch_id"] for b in api.get(URL).get_json()["batches"]]


# ------------------------------------------------------------------------- errors
def _no_batches(api: SpecClient) -> None:
    assert api.get(URL).get_json() == {"batches": [], "next_cursor": None}
    assert api.get("/v1/metrics/iris").get_json()["records"] == 0


@pytest.mark.parametrize(
    "kwargs",
    [
        {"data": "{records", "content_type": "application/json"},
        {"json": [1, 2]},
        # nesting deeper than the JSON parser recurses (was a 500)
        {"data": '{"records": ' + "[" * 100_000 + "]" * 100_000 + "}",
         "content_type": "application/json"},
    ],
)
def test_post_malformed_is_400(api: SpecClient, metric: str, unchanged, kwargs: dict) -> None:
    with unchanged():
        assert_problem(api.post(URL, **kwargs), 400)
    _no_batches(api)


@pytest.mark.parametrize("content_type", [None, "text/plain", "application/xml"])
def test_post_unsupported_media_is_415(api: SpecClient, metric: str, unchanged,
                                       content_type: str | None) -> None:
    with unchanged():
        kwargs = {"content_type": content_type} if content_type else {}
        body = assert_problem(api.post(URL, data="{}", **kwargs), 415)
        assert "application/vnd.likewise.batch-stats+json" in body["detail"]
    _no_batches(api)


def _bodies(X, labels):
    """(body or raw JSON text, the field the 422 must name)."""
    recs = as_records(X)
    groups = [int(v) for v in labels]
    rows = X.tolist()
    nan_text = (
        '{"records": [{"sepal_length": NaN, "sepal_width": 1, "petal_length": 1, '
        '"petal_width": 1}, {"sepal_length": 1, "sepal_width": 1, "petal_length": 1, '
        '"petal_width": 1}], "groups": [0, 1]}'
    )
    return [
        ({"records": recs}, "groups"),
        ({"groups": groups}, "records"),
        ({"records": recs, "columns": IRIS_FEATURES, "rows": rows, "groups": groups}, "records"),
        ({"columns": IRIS_FEATURES, "groups": groups}, "rows"),
        ({"rows": rows, "groups": groups}, "columns"),
        ({"records": {"a": 1}, "groups": groups}, "records"),
        ({"records": [], "groups": groups}, "records"),
        ({"records": recs, "groups": [], "extra": 1}, "extra"),
        ({"records": recs, "groups": "abc"}, "groups"),
        ({"columns": IRIS_FEATURES[:3], "rows": X[:, :3].tolist(), "groups": groups}, "columns"),
        ({"columns": [*IRIS_FEATURES[:3], "colour"], "rows": rows, "groups": groups}, "columns"),
        ({"columns": IRIS_FEATURES, "rows": [rows[0], rows[1][:3], *rows[2:]],
          "groups": groups}, "rows[1]"),
        ({"columns": IRIS_FEATURES, "rows": [rows[0], ["1", 2, 3, 4], *rows[2:]],
          "groups": groups}, "rows[1]"),
        ({"records": [recs[0], {**recs[1], "colour": 1}, *recs[2:]], "groups": groups},
         "records[1]"),
        ({"records": [recs[0], {"sepal_length": 1.0}, *recs[2:]], "groups": groups},
         "records[1]"),
        ({"records": [{**recs[0], "petal_width": True}, *recs[1:]], "groups": groups},
         "records[0]"),
        ({"records": recs, "groups": groups[:-1]}, "groups"),
        ({"records": recs, "groups": [0] * len(recs)}, "groups"),
        ({"records": recs, "groups": [0, "a", *groups[2:]]}, "groups"),
        (nan_text, "records[0]"),
        # finite values whose squares overflow float64: the statistics would be inf/nan
        ({"records": [{**recs[0], "sepal_length": 1e200}, *recs[1:]], "groups": groups},
         "records"),
        ({"columns": IRIS_FEATURES, "rows": [[-1e200, 1, 1, 1], *rows[1:]], "groups": groups},
         "rows"),
    ]


@pytest.mark.parametrize("case", range(22))
def test_post_invalid_is_422_naming_the_field(
    api: SpecClient, metric: str, unchanged, batch, case: int
) -> None:
    body, field = _bodies(*batch)[case]
    with unchanged():
        if isinstance(body, str):
            resp = api.post(URL, data=body, content_type="application/json")
        else:
            resp = api.post(URL, json=body)
    assert_problem(resp, 422, field)
    _no_batches(api)


def test_too_many_records_is_413(ctx: Context, metric: str, unchanged, batch) -> None:
    X, labels = batch
    small = Context.build(ctx.settings.replace(max_batch_records=len(X) - 1),
                          connection=ctx.redis)
    api = SpecClient(create_app(context=small), ctx.settings.admin_token)
    with unchanged():
        resp = api.post(URL, json=records_body(X, labels))
    assert_problem(resp, 413, "records")
    _no_batches(api)


def test_request_body_over_limit_is_413(ctx: Context, metric: str, unchanged, batch) -> None:
    small = Context.build(ctx.settings.replace(max_request_bytes=1024), connection=ctx.redis)
    api = SpecClient(create_app(context=small), ctx.settings.admin_token)
    with unchanged():
        assert_problem(api.post(URL, json=records_body(*batch)), 413)
    _no_batches(api)


def test_unknown_metric_is_404_on_every_batch_route(api: SpecClient, unchanged, batch) -> None:
    base = "/v1/metrics/nothing/batches"
    with unchanged():
        assert_problem(api.post(base, json=records_body(*batch)), 404)
        assert_problem(api.get(base), 404)
        assert_problem(api.get(f"{base}/0123456789abcdef"), 404)
        assert_problem(api.delete(f"{base}/0123456789abcdef"), 404)


@pytest.mark.parametrize("batch_id", ["0123456789abcdef", "not-an-id"])
def test_unknown_batch_is_404(
    api: SpecClient, with_batches: list[str], unchanged, batch_id: str
) -> None:
    with unchanged():
        assert_problem(api.get(f"{URL}/{batch_id}"), 404)
        assert_problem(api.delete(f"{URL}/{batch_id}"), 404)
    assert len(api.get(URL).get_json()["batches"]) == len(with_batches)


@pytest.mark.parametrize("method", ["GET", "POST"])
def test_invalid_metric_name_is_422(api: SpecClient, unchanged, batch, method: str) -> None:
    kwargs = {"json": records_body(*batch)} if method == "POST" else {}
    with unchanged():
        assert_problem(api.open(method, "/v1/metrics/Bad!/batches", **kwargs), 422, "name")
