"""``/v1/metrics``: create / unchanged / update / 409, list, read, delete, and their errors."""

from __future__ import annotations

import pytest

from service.api import create_app
from service.context import Context

from .conftest import ETL_TOKEN
from .helpers import IRIS_FEATURES, assert_problem
from .spec import SpecClient

BODY = {"features": IRIS_FEATURES, "description": "iris measurements"}


def test_put_creates_then_unchanged_then_updates(api: SpecClient) -> None:
    created = api.put("/v1/metrics/iris", json=BODY)
    assert created.status_code == 201
    assert created.headers["Location"] == "/v1/metrics/iris"
    metric = created.get_json()
    assert metric["features"] == IRIS_FEATURES
    assert (metric["active_version"], metric["batches"], metric["records"]) == (None, 0, 0)

    again = api.put("/v1/metrics/iris", json=BODY)
    assert again.status_code == 200
    assert again.get_json()["features"] == IRIS_FEATURES

    updated = api.put("/v1/metrics/iris", json={**BODY, "description": "new words"})
    assert updated.status_code == 200
    assert api.get("/v1/metrics/iris").get_json()["description"] == "new words"


def test_features_may_change_while_there_are_no_batches(api: SpecClient) -> None:
    api.put("/v1/metrics/iris", json=BODY)
    resp = api.put("/v1/metrics/iris", json={"features": IRIS_FEATURES[:2]})
    assert resp.status_code == 200
    assert api.get("/v1/metrics/iris").get_json()["features"] == IRIS_FEATURES[:2]


def test_changing_features_of_a_metric_with_batches_is_409(
    api: SpecClient, with_batches: list[str], unchanged
) -> None:
    with unchanged():
        resp = api.put("/v1/metrics/iris", json={"features": IRIS_FEATURES[:3]})
    assert_problem(resp, 409)
    assert api.get("/v1/metrics/iris").get_json()["features"] == IRIS_FEATURES


def test_list_get_delete(api: SpecClient, with_batches: list[str]) -> None:
    api.put("/v1/metrics/other", json={"features": ["a", "b"]})
    listed = api.get("/v1/metrics", token=ETL_TOKEN).get_json()["metrics"]
    assert sorted(m["name"] for m in listed) == ["iris", "other"]
    iris = api.get("/v1/metrics/iris").get_json()
    assert iris["batches"] == len(with_batches) and iris["records"] > 0

    assert api.delete("/v1/metrics/iris").status_code == 204
    assert_problem(api.get("/v1/metrics/iris"), 404)
    assert_problem(api.get("/v1/metrics/iris/batches"), 404)
    assert [m["name"] for m in api.get("/v1/metrics").get_json()["metrics"]] == ["other"]


# ------------------------------------------------------------------------- errors
@pytest.mark.parametrize(
    ("kwargs", "why"),
    [
        ({"data": '{"features": ["a"]}'}, "no content type"),
        ({"data": '{"features": ["a"]}', "content_type": "text/plain"}, "wrong content type"),
        ({"data": '{"features": [', "content_type": "application/json"}, "malformed JSON"),
        ({"json": ["a", "b"]}, "not an object"),
        ({"data": b"", "content_type": "application/json"}, "empty body"),
        # an unpaired surrogate escape is valid JSON syntax but not Unicode text: storing
        # it raised UnicodeEncodeError (a 500, found by schemathesis-driven probing)
        ({"data": '{"features": ["a"], "description": "\\ud800"}',
          "content_type": "application/json"}, "lone surrogate in a string"),
        ({"data": '{"features": ["\\udc00x"]}', "content_type": "application/json"},
         "lone low surrogate in a feature"),
    ],
)
def test_put_malformed_body_is_400(api: SpecClient, unchanged, kwargs: dict, why: str) -> None:
    with unchanged():
        resp = api.put("/v1/metrics/iris", **kwargs)
    assert_problem(resp, 400)
    assert_problem(api.get("/v1/metrics/iris"), 404)


@pytest.mark.parametrize(
    ("path", "body", "field"),
    [
        ("/v1/metrics/iris", {}, "features"),
        ("/v1/metrics/iris", {"features": []}, "features"),
        ("/v1/metrics/iris", {"features": "a"}, "features"),
        ("/v1/metrics/iris", {"features": ["a", 2]}, "features[1]"),
        ("/v1/metrics/iris", {"features": ["a", ""]}, "features[1]"),
        ("/v1/metrics/iris", {"features": ["a", "a"]}, "features"),
        ("/v1/metrics/iris", {"features": ["a", " b"]}, "features[1]"),
        ("/v1/metrics/iris", {"features": ["a"], "colour": "red"}, "colour"),
        ("/v1/metrics/iris", {"features": ["a"], "description": 3}, "description"),
        ("/v1/metrics/iris", {"features": ["a"], "description": "x" * 2001}, "description"),
        ("/v1/metrics/Iris", {"features": ["a"]}, "name"),
        ("/v1/metrics/" + "a" * 65, {"features": ["a"]}, "name"),
        ("/v1/metrics/ir%20is", {"features": ["a"]}, "name"),
    ],
)
def test_put_invalid_is_422_naming_the_field(
    api: SpecClient, unchanged, path: str, body: dict, field: str
) -> None:
    with unchanged():
        resp = api.put(path, json=body)
    assert_problem(resp, 422, field)
    assert api.get("/v1/metrics").get_json() == {"metrics": [], "next_cursor": None}


def test_escaped_surrogate_pairs_are_text(api: SpecClient) -> None:
    """A paired escape is one character (U+1F600 here) and round-trips; only unpaired
    halves are refused (above)."""
    body = '{"features": ["t\\ud83d\\ude00"], "description": "\\ud83d\\ude00"}'
    resp = api.put("/v1/metrics/pairs", data=body, content_type="application/json")
    assert resp.status_code == 201, resp.get_json()
    got = api.get("/v1/metrics/pairs").get_json()
    assert (got["features"], got["description"]) == (["t\U0001f600"], "\U0001f600")


def test_put_too_many_features_is_422(api: SpecClient, ctx: Context, unchanged) -> None:
    too_many = [f"f{i}" for i in range(ctx.settings.max_batch_features + 1)]
    with unchanged():
        resp = api.put("/v1/metrics/wide", json={"features": too_many})
    assert_problem(resp, 422, "features")


def test_body_over_the_request_limit_is_413(ctx: Context, unchanged) -> None:
    small = Context.build(ctx.settings.replace(max_request_bytes=512), connection=ctx.redis)
    api = SpecClient(create_app(context=small), ctx.settings.admin_token)
    with unchanged():
        resp = api.put("/v1/metrics/iris", json={"features": ["x" * 100] * 10})
    body = assert_problem(resp, 413)
    assert "512" in body["detail"]
    assert_problem(api.get("/v1/metrics/iris"), 404)


@pytest.mark.parametrize("method", ["GET", "DELETE"])
def test_get_and_delete_unknown_metric_are_404(api: SpecClient, unchanged, method: str) -> None:
    with unchanged():
        assert_problem(api.open(method, "/v1/metrics/nothing"), 404)


@pytest.mark.parametrize("method", ["GET", "DELETE"])
def test_get_and_delete_invalid_name_are_422(api: SpecClient, unchanged, method: str) -> None:
    with unchanged():
        assert_problem(api.open(method, "/v1/metrics/NOT_OK"), 422, "name")
