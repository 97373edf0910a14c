"""Statistics-only batches: ``POST /v1/metrics/{name}/batches`` with
``application/vnd.likewise.batch-stats+json`` (docs/batch-stats.md), every error path,
and fits over a mix of statistics-only batches and batches with records.

Data: iris (Fisher 1936, scikit-learn's copy). Reference for the statistics: numpy on
the records (``helpers.stats_doc``), compared with the service's own BatchStats.
"""

from __future__ import annotations

import copy
import json

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.core import BatchStats
from service.usecases.batches import load_training_data

from .helpers import assert_problem, iris_batches, post_batches, stats_doc

URL = "/v1/metrics/iris/batches"
MEDIA = "application/vnd.likewise.batch-stats+json"


def post_stats(api, doc, query="", headers=None):
    return api.post(URL + query, data=json.dumps(doc), content_type=MEDIA,
                    headers=headers or {})


@pytest.fixture
def batch():
    return iris_batches(1, seed=3)[0]


def test_stored_statistics_equal_the_services_own(api, ctx, metric, batch):
    X, labels = batch
    resp = post_stats(api, stats_doc(X, labels))
    assert resp.status_code == 201, resp.get_json()
    made = resp.get_json()
    assert made["kind"] == "statistics" and made["records"] == len(X)
    assert made["groups"] == len(set(labels.tolist()))
    assert resp.headers["Location"] == f"{URL}/{made['batch_id']}"
    detail = api.get(resp.headers["Location"]).get_json()
    assert detail["kind"] == "statistics"
    assert sum(detail["group_sizes"].values()) == len(X)
    (row,) = load_training_data(ctx, metric)
    assert row["X"] is None and row["labels"] is None
    own = BatchStats.from_batch(X, labels)
    # tolerance: float64 rounding of two orders of summation over ~50 records
    assert row["stats"].allclose(own, rtol=1e-12, atol=1e-10)
    listed = api.get(URL).get_json()["batches"]
    assert [b["kind"] for b in listed] == ["statistics"]
    assert api.get("/v1/metrics/iris").get_json()["records"] == len(X)


def test_duplicates_and_idempotency(api, metric, batch):
    doc = stats_doc(*batch)
    first = post_stats(api, doc).get_json()
    dup = post_stats(api, doc)
    assert dup.status_code == 409 and dup.get_json()["batch_id"] == first["batch_id"]
    again = post_stats(api, doc, "?allow_duplicate=true")
    assert again.status_code == 201 and again.get_json()["sha256"] == first["sha256"]
    key = {"Idempotency-Key": "stats-1"}
    a = post_stats(api, doc, "?allow_duplicate=true", key)
    b = post_stats(api, doc, "?allow_duplicate=true", key)
    assert a.status_code == b.status_code == 201
    assert b.headers["Answer-Replayed"] == "true"
    assert a.get_json() == b.get_json()
    assert len(api.get(URL).get_json()["batches"]) == 3


def _broken(doc, field, value):
    doc = copy.deepcopy(doc)
    if callable(value):
        value(doc)
    else:
        doc[field] = value
    return doc


def _asym(doc):
    doc["scatter"][0][1] += 1.0


def _negative(doc):
    doc["between"] = (-np.asarray(doc["between"])).tolist()


def _within(doc):
    doc["between"] = (2 * np.asarray(doc["scatter"])).tolist()


def _nan_text(doc):
    doc["sums"][2] = "NaN"


@pytest.mark.parametrize("field,value", [
    ("format", "likewise.batch-stats/2"),
    ("features", ["petal_length", "sepal_length", "sepal_width", "petal_width"]),
    ("n", 1.5),
    ("n", True),
    ("k", 1),
    ("group_sizes", {"a": 10, "b": 0}),
    ("group_sizes", lambda d: d["group_sizes"].update({"zz": 1})),
    ("sums", [1.0, 2.0]),
    ("sums", _nan_text),
    ("scatter", [[1.0, 0.0], [0.0, 1.0]]),
    ("scatter", _asym),
    ("between", _negative),
    ("between", _within),
    ("between", "not a list"),
])
def test_refused_naming_the_field(api, metric, batch, unchanged, field, value):
    doc = _broken(stats_doc(*batch), field, value)
    if field == "group_sizes" and callable(value):
        doc["k"] = len(doc["group_sizes"])  # k agrees; the sizes no longer add up to n
    with unchanged():
        assert_problem(post_stats(api, doc), 422, field)


def test_unknown_member_and_non_finite_json(api, metric, batch, unchanged):
    with unchanged():
        assert_problem(post_stats(api, {**stats_doc(*batch), "extra": 1}), 422, "extra")
        raw = json.dumps(stats_doc(*batch)).replace("[", "[NaN, ", 1)
        resp = api.post(URL, data=raw, content_type=MEDIA)
        assert resp.status_code in (400, 422)


def test_fit_from_statistics_and_two_raw_batches_gives_the_all_raw_matrix(
        api, ctx, metric, fit_to_version):
    batches = iris_batches(6)
    params = {"method": "discriminant", "alphas": [0.1], "activate": "at_once"}
    post_batches(api, metric, batches)
    all_raw = fit_to_version(metric, **params)
    all_raw_doc = api.get(f"/v1/metrics/iris/versions/{all_raw['version']}").get_json()
    for b in api.get(URL).get_json()["batches"][2:]:
        assert api.delete(f"{URL}/{b['batch_id']}").status_code == 204
    for X, labels in batches[2:]:
        assert post_stats(api, stats_doc(X, labels)).status_code == 201
    mixed = fit_to_version(metric, **params)
    mixed_doc = api.get(f"/v1/metrics/iris/versions/{mixed['version']}").get_json()
    report = mixed_doc["report"]
    assert (report["n_batches"], report["n_stats_only_batches"],
            report["n_heldout_batches"]) == (6, 4, 2)
    assert report["cv"] == "leave-one-batch-out"

    def matrix(doc):
        L = np.asarray(doc["metric"]["components"])
        return L.T @ L

    # same summed statistics → same learned matrix (up to rounding)
    assert_allclose(matrix(mixed_doc), matrix(all_raw_doc), rtol=1e-8, atol=1e-10)
    assert_allclose(mixed_doc["metric"]["mean"], all_raw_doc["metric"]["mean"], rtol=1e-12)


def test_fit_with_one_raw_batch_is_refused_saying_why(api, ctx, metric, run_worker_burst):
    batches = iris_batches(4)
    ids = post_batches(api, metric, batches[:2])
    for X, labels in batches[2:]:
        assert post_stats(api, stats_doc(X, labels)).status_code == 201
    api.delete(f"/v1/metrics/iris/batches/{ids[0]}")
    refused = api.post("/v1/metrics/iris/fits", json={})
    assert refused.status_code == 409
    assert "1 batch(es) with records and 2 statistics-only" in refused.get_json()["detail"]
    # a batch deleted after the fit was queued: the worker fails it, saying why
    ids = post_batches(api, metric, batches[:1])
    resp = api.post("/v1/metrics/iris/fits", json={})
    assert resp.status_code == 202
    api.delete(f"/v1/metrics/iris/batches/{ids[0]}")
    run_worker_burst(ctx, max_jobs=5)
    fit = api.get(resp.headers["Location"]).get_json()
    assert fit["status"] == "failed"
    assert "1 batch(es) with records" in fit["error"] and "2 statistics-only" in fit["error"]


def test_the_worked_example_of_the_docs(api, ctx):
    """docs/batch-stats.md's example, worked by hand there, equals the service's own
    statistics of the same four records."""
    assert api.put("/v1/metrics/hw", json={"features": ["height", "weight"]}).status_code == 201
    doc = {"format": "likewise.batch-stats/1", "features": ["height", "weight"], "n": 4,
           "k": 2, "group_sizes": {"a": 2, "b": 2}, "sums": [16.0, 16.0],
           "scatter": [[20.0, 16.0], [16.0, 16.0]], "between": [[16.0, 16.0], [16.0, 16.0]]}
    resp = api.post("/v1/metrics/hw/batches", data=json.dumps(doc), content_type=MEDIA)
    assert resp.status_code == 201, resp.get_json()
    (row,) = load_training_data(ctx, "hw")
    own = BatchStats.from_batch(np.array([[1.0, 2], [3, 2], [5, 6], [7, 6]]),
                                ["a", "a", "b", "b"])
    assert row["stats"].allclose(own, rtol=1e-15, atol=1e-12)
