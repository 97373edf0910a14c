"""Fits over HTTP: 202 + Location, dedupe, real worker runs, listing, retry, errors."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest

from service.context import Context

from .conftest import ETL_TOKEN
from .helpers import assert_problem, iris_batches, post_batches
from .spec import SpecClient

FITS = "/v1/metrics/iris/fits"


def test_fit_is_accepted_then_runs_on_a_real_worker(
    api: SpecClient, ctx: Context, with_batches: list[str], run_worker_burst: Callable
) -> None:
    resp = api.post(FITS)  # no body at all: every parameter defaults
    assert resp.status_code == 202
    fit = resp.get_json()
    assert resp.headers["Location"] == f"/v1/fits/{fit['fit_id']}"
    assert (fit["status"], fit["progress"], fit["version"]) == ("waiting", 0.0, None)
    assert fit["params"]["method"] == "auto" and fit["params"]["activate"] == "when_better"
    assert fit["requested_by"] == "admin"
    assert api.get(resp.headers["Location"]).get_json()["status"] == "waiting"

    run_worker_burst(ctx, max_jobs=1)
    done = api.get(resp.headers["Location"]).get_json()
    assert (done["status"], done["progress"], done["version"]) == ("succeeded", 1.0, 1)
    assert done["decision"]["activated"] is True
    assert done["error"] is None and done["attempts"] == 1
    assert api.get("/v1/metrics/iris").get_json()["active_version"] == 1


def test_identical_request_while_queued_returns_the_same_fit(
    api: SpecClient, with_batches: list[str]
) -> None:
    first = api.post(FITS, json={"method": "closed_form"})
    second = api.post(FITS, json={"method": "closed_form", "activate": "when_better"})
    assert second.status_code == 202
    assert second.get_json()["fit_id"] == first.get_json()["fit_id"]
    assert second.headers["Location"] == first.headers["Location"]
    other = api.post(FITS, json={"method": "diagonal"}, token=ETL_TOKEN).get_json()
    assert other["fit_id"] != first.get_json()["fit_id"]
    assert other["requested_by"] == "etl"
    assert len(api.get("/v1/fits?metric=iris").get_json()["fits"]) == 2


def test_list_fits_filters_by_metric_and_status(
    api: SpecClient, ctx: Context, with_batches: list[str], run_worker_burst: Callable
) -> None:
    done = api.post(FITS, json={"method": "euclidean"}).get_json()["fit_id"]
    run_worker_burst(ctx, max_jobs=1)
    waiting = api.post(FITS, json={"method": "diagonal"}).get_json()["fit_id"]
    api.put("/v1/metrics/other", json={"features": ["a", "b"]})

    def ids(query: str) -> list[str]:
        return [f["fit_id"] for f in api.get(f"/v1/fits{query}").get_json()["fits"]]

    assert ids("") == [waiting, done]  # newest first
    assert ids("?metric=iris&status=succeeded") == [done]
    assert ids("?status=waiting") == [waiting]
    assert ids("?metric=other") == []


def _failed_fit(
    api: SpecClient, ctx: Context, batch_ids: list[str], run_worker_burst: Callable
) -> dict[str, Any]:
    """A fit that really failed: queued with 2 batches, one deleted before it ran."""
    fit_id = api.post(FITS).get_json()["fit_id"]
    assert api.delete(f"/v1/metrics/iris/batches/{batch_ids[0]}").status_code == 204
    run_worker_burst(ctx, max_jobs=1)
    fit = api.get(f"/v1/fits/{fit_id}").get_json()
    assert fit["status"] == "failed" and "at least 2" in fit["error"]
    return fit


def test_retry_a_failed_fit(
    api: SpecClient, ctx: Context, metric: str, run_worker_burst: Callable
) -> None:
    ids = post_batches(api, "iris", iris_batches(2))
    fit = _failed_fit(api, ctx, ids, run_worker_burst)
    url = f"/v1/fits/{fit['fit_id']}/retry"
    post_batches(api, "iris", iris_batches(1, seed=7))

    resp = api.post(url, token=ETL_TOKEN)
    assert resp.status_code == 202
    assert resp.headers["Location"] == f"/v1/fits/{fit['fit_id']}"
    assert (resp.get_json()["status"], resp.get_json()["error"]) == ("waiting", None)
    run_worker_burst(ctx, max_jobs=1)
    done = api.get(f"/v1/fits/{fit['fit_id']}").get_json()
    assert (done["status"], done["version"]) == ("succeeded", 1)


# ------------------------------------------------------------------------- errors
def test_retry_needs_two_batches_409(
    api: SpecClient, ctx: Context, metric: str, run_worker_burst: Callable, unchanged
) -> None:
    ids = post_batches(api, "iris", iris_batches(2))
    fit = _failed_fit(api, ctx, ids, run_worker_burst)
    with unchanged():
        assert_problem(api.post(f"/v1/fits/{fit['fit_id']}/retry"), 409)
    assert api.get(f"/v1/fits/{fit['fit_id']}").get_json()["status"] == "failed"


@pytest.mark.parametrize("run_first", [False, True])
def test_retry_of_a_fit_that_did_not_fail_is_409(
    api: SpecClient, ctx: Context, with_batches: list[str], run_worker_burst: Callable,
    unchanged, run_first: bool,
) -> None:
    fit_id = api.post(FITS).get_json()["fit_id"]
    if run_first:
        run_worker_burst(ctx, max_jobs=1)
    before = api.get(f"/v1/fits/{fit_id}").get_json()
    with unchanged():
        assert_problem(api.post(f"/v1/fits/{fit_id}/retry"), 409)
    assert api.get(f"/v1/fits/{fit_id}").get_json() == before


@pytest.mark.parametrize("fit_id", ["0123456789abcdef0123", "nope"])
def test_unknown_fit_is_404(api: SpecClient, unchanged, fit_id: str) -> None:
    with unchanged():
        assert_problem(api.get(f"/v1/fits/{fit_id}"), 404)
        assert_problem(api.post(f"/v1/fits/{fit_id}/retry"), 404)


def test_fit_of_unknown_metric_is_404(api: SpecClient, unchanged) -> None:
    with unchanged():
        assert_problem(api.post("/v1/metrics/nothing/fits"), 404)


@pytest.mark.parametrize("n_batches", [0, 1])
def test_fit_needs_two_batches_409(
    api: SpecClient, metric: str, unchanged, n_batches: int
) -> None:
    post_batches(api, "iris", iris_batches(n_batches))
    with unchanged():
        assert_problem(api.post(FITS), 409)
    assert api.get("/v1/fits").get_json() == {"fits": [], "next_cursor": None}


@pytest.mark.parametrize(
    "kwargs",
    [
        {"data": "method=auto", "content_type": "application/x-www-form-urlencoded"},
        {"data": "{", "content_type": "application/json"},
        {"json": ["auto"]},
    ],
)
def test_fit_malformed_body_is_400(
    api: SpecClient, with_batches: list[str], unchanged, kwargs: dict
) -> None:
    with unchanged():
        assert_problem(api.post(FITS, **kwargs), 400)
    assert api.get("/v1/fits").get_json() == {"fits": [], "next_cursor": None}


@pytest.mark.parametrize(
    ("body", "field"),
    [
        ({"method": "magic"}, "method"),
        ({"activate": "sometimes"}, "activate"),
        ({"n_folds": 1}, "n_folds"),
        ({"n_folds": "3"}, "n_folds"),
        ({"n_folds": 21}, "n_folds"),
        ({"alphas": []}, "alphas"),
        ({"alphas": [0]}, "alphas[0]"),
        ({"alphas": [0.1, "x"]}, "alphas[1]"),
        ({"max_rank": 0}, "max_rank"),
        ({"k_max": 1}, "k_max"),
        ({"seed": -1}, "seed"),
        ({"seed": 1.5}, "seed"),
        ({"colour": "red"}, "colour"),
    ],
)
def test_fit_invalid_params_are_422(
    api: SpecClient, with_batches: list[str], unchanged, body: dict, field: str
) -> None:
    with unchanged():
        assert_problem(api.post(FITS, json=body), 422, field)
    assert api.get("/v1/fits").get_json() == {"fits": [], "next_cursor": None}


@pytest.mark.parametrize(("former", "now"), [("if_better", "when_better"),
                                           ("always", "at_once"), ("never", "by_hand")])
def test_former_activation_policy_names_are_refused_naming_the_new_one(
    api: SpecClient, with_batches: list[str], unchanged, former: str, now: str
) -> None:
    with unchanged():
        body = assert_problem(api.post(FITS, json={"activate": former}), 422, "activate")
    message = next(e["message"] for e in body["errors"] if e["field"] == "activate")
    assert repr(now) in message and "when_better, at_once, by_hand" in message
    assert api.get("/v1/fits").get_json()["fits"] == []


@pytest.mark.parametrize(
    ("query", "status", "field"),
    [
        ("?status=done", 422, "status"),
        ("?status=queued", 422, "status"),  # the former name of waiting
        ("?metric=Bad!", 422, "metric"),  # the query parameter at fault, not "name"
        ("?colour=red", 422, "colour"),
        ("?metric=nothing", 404, None),
    ],
)
def test_list_fits_bad_query(
    api: SpecClient, unchanged, query: str, status: int, field: str | None
) -> None:
    with unchanged():
        assert_problem(api.get(f"/v1/fits{query}"), status, field)
