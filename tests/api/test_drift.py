"""``GET /v1/metrics/{name}/drift`` over HTTP: a unit change flagged by name, errors.

Data: iris (Fisher 1936), scikit-learn's copy, in the batches of ``helpers.py``; the
live records are the training batches' own records, one feature rescaled by 1,000 (a
unit change, e.g. metres read as millimetres).
"""

from __future__ import annotations

import numpy as np

from .helpers import IRIS_FEATURES, as_records, assert_problem, iris_batches


def test_a_unit_change_is_flagged_by_feature_name(api, fitted, fit_to_version) -> None:
    pool = np.vstack([X for X, _ in iris_batches(6)])
    body = api.get("/v1/metrics/iris/drift").get_json()
    assert body["verdict"] == "quiet" and body["records"] == 0  # nothing grouped yet
    assert body["features"]["sepal_length"]["psi"] is None
    resp = api.post("/v1/metrics/iris/groupings", json={"records": as_records(pool), "k": 3})
    assert resp.status_code == 200
    body = api.get("/v1/metrics/iris/drift?version=1").get_json()
    assert body["verdict"] == "steady" and body["records"] == len(pool), body["features"]
    assert list(body["features"]) == IRIS_FEATURES and body["flagged"] == []
    # margins are scored against the batches cross-validation held out (six batches:
    # all of them scored, each grouped by the map of the fold that held it out)
    assert body["margins"]["reference"] == body["distances"]["reference"] == "held_out"
    assert body["reference_heldout_batches"] == 6

    # version 2 (active), fed petal lengths in millimetres instead of centimetres
    assert fit_to_version("iris", activate="at_once", method="diagonal")["version"] == 2
    moved = pool.copy()
    moved[:, 2] *= 1000
    resp = api.post("/v1/metrics/iris/groupings", json={"records": as_records(moved), "k": 3})
    assert resp.status_code == 200
    body = api.get("/v1/metrics/iris/drift").get_json()
    assert body["version"] == 2 and body["verdict"] == "drifted"
    assert body["flagged"] == ["petal_length"], body["features"]
    assert body["features"]["petal_length"]["mean_shift"] > 100
    # the same verdict in the Prometheus exposition
    scraped = api.get("/metrics").get_data(as_text=True)
    assert 'likewise_drift_verdict{metric="iris",verdict="drifted"} 1.0' in scraped
    assert 'likewise_drift_flagged_features{metric="iris"} 1.0' in scraped
    # version 1 saw none of it
    assert api.get("/v1/metrics/iris/drift?version=1").get_json()["verdict"] == "steady"
    assert_problem(api.get("/v1/metrics/iris/drift?version=9"), 404)


def test_drift_errors_name_the_field(api, with_batches, unchanged) -> None:
    with unchanged():
        assert_problem(api.get("/v1/metrics/iris/drift"), 409)  # no version yet
        assert_problem(api.get("/v1/metrics/nope/drift"), 404)
        assert_problem(api.get("/v1/metrics/iris/drift?since=soon"), 422, "since")
        assert_problem(api.get("/v1/metrics/iris/drift?version=x"), 422, "version")
        assert_problem(api.get("/v1/metrics/iris/drift?version=0"), 422, "version")
        assert_problem(api.get("/v1/metrics/iris/drift?colour=red"), 422, "colour")
