"""Versions, activation (roll back / forward) and the activation history over HTTP."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from .conftest import ETL_TOKEN
from .helpers import IRIS_FEATURES, assert_problem
from .spec import SpecClient

BASE = "/v1/metrics/iris"


def test_version_lists_and_details(
    api: SpecClient, fitted: dict[str, Any], with_batches: list[str]
) -> None:
    versions = api.get(f"{BASE}/versions").get_json()["versions"]
    assert [(v["version"], v["active"]) for v in versions] == [(1, True)]
    detail = api.get(f"{BASE}/versions/1").get_json()
    assert {k: detail[k] for k in versions[0]} == versions[0]
    assert sorted(b["batch_id"] for b in detail["batches"]) == sorted(with_batches)
    assert (detail["fit_id"], detail["parent"]) == (fitted["fit_id"], None)
    assert detail["metric"]["features"] == IRIS_FEATURES
    d = len(IRIS_FEATURES)
    assert np.asarray(detail["metric"]["matrix"]).shape == (d, d)
    assert detail["report"]["score"] == detail["score"]


def test_activate_roll_forward_and_back_with_history(
    api: SpecClient, fitted: dict[str, Any], fit_to_version: Callable[..., dict]
) -> None:
    second = fit_to_version("iris", method="euclidean", activate="by_hand")
    assert second["version"] == 2 and second["decision"]["activated"] is False
    assert api.get(BASE).get_json()["active_version"] == 1
    assert api.get(f"{BASE}/versions/2").get_json()["parent"] == 1

    fwd = api.put(f"{BASE}/active", json={"version": 2, "reason": "try the baseline"})
    assert fwd.status_code == 200
    assert fwd.get_json() == {"name": "iris", "active_version": 2, "previous_version": 1}
    assert [v["active"] for v in api.get(f"{BASE}/versions").get_json()["versions"]] == [
        False, True,
    ]
    back = api.put(f"{BASE}/active", json={"version": 1}, token=ETL_TOKEN)
    assert back.get_json() == {"name": "iris", "active_version": 1, "previous_version": 2}

    history = api.get(f"{BASE}/history").get_json()["history"]
    moves = [(h["from"], h["to"], h["who"], h["fit_id"]) for h in history]
    assert moves == [
        (None, 1, "admin", fitted["fit_id"]),
        (1, 2, "admin", None),
        (2, 1, "etl", None),
    ]
    assert history[1]["reason"] == "try the baseline" and history[2]["reason"] == ""


# ------------------------------------------------------------------------- errors
def test_unknown_metric_is_404_on_every_version_route(api: SpecClient, unchanged) -> None:
    base = "/v1/metrics/nothing"
    with unchanged():
        assert_problem(api.get(f"{base}/versions"), 404)
        assert_problem(api.get(f"{base}/versions/1"), 404)
        assert_problem(api.put(f"{base}/active", json={"version": 1}), 404)
        assert_problem(api.get(f"{base}/history"), 404)


def test_metric_without_versions(api: SpecClient, metric: str, unchanged) -> None:
    with unchanged():
        assert api.get(f"{BASE}/versions").get_json() == {"versions": [], "next_cursor": None}
        assert api.get(f"{BASE}/history").get_json() == {"history": [], "next_cursor": None}
        assert_problem(api.get(f"{BASE}/versions/1"), 404)
        assert_problem(api.put(f"{BASE}/active", json={"version": 1}), 404)


MALFORMED = [
    {"data": '{"version": 1}'},
    {"data": '{"version": ', "content_type": "application/json"},
    {"json": [1]},
]
INVALID = [
    ({}, 422, "version"),
    ({"version": "1"}, 422, "version"),
    ({"version": 1.5}, 422, "version"),
    ({"version": 0}, 422, "version"),
    ({"version": True}, 422, "version"),
    ({"version": 1, "reason": 7}, 422, "reason"),
    ({"version": 1, "reason": "x" * 1001}, 422, "reason"),
    ({"version": 1, "who": "me"}, 422, "who"),
    ({"version": 5}, 404, None),
]


def test_every_error_of_a_fitted_metric(
    api: SpecClient, fitted: dict[str, Any], unchanged
) -> None:
    """One fit, then each error case in turn (a fit per case would be slow)."""
    history = api.get(f"{BASE}/history").get_json()
    with unchanged():
        assert_problem(api.get(f"{BASE}/versions/9"), 404)
        assert_problem(api.get(f"{BASE}/versions/0"), 422, "version")
        assert_problem(api.get(f"{BASE}/versions/one"), 404)  # no such route
        for kwargs in MALFORMED:
            assert_problem(api.put(f"{BASE}/active", **kwargs), 400)
        for body, status, field in INVALID:
            assert_problem(api.put(f"{BASE}/active", json=body), status, field)
    assert api.get(f"{BASE}/history").get_json() == history
    assert api.get(BASE).get_json()["active_version"] == 1
