"""Payload builders from open data, and the problem-body assertion of the HTTP tests."""

from __future__ import annotations

from typing import Any

import numpy as np
from werkzeug.test import TestResponse

from tests.datasets import load_open, make_batches

from .spec import SpecClient

# Iris (Fisher 1936), as bundled with scikit-learn; the feature names are ours.
IRIS_FEATURES = ["sepal_length", "sepal_width", "petal_length", "petal_width"]
PROBLEM_BASE = "urn:likewise:problem:"
SLUGS = {
    400: {"malformed-request"}, 401: {"unauthorized"}, 403: {"forbidden"},
    404: {"not-found"},
    405: {"method-not-allowed"}, 408: {"request-timeout"}, 409: {"conflict"},
    413: {"payload-too-large"},
    415: {"unsupported-media-type"},
    422: {"invalid-input"}, 500: {"internal-error"}, 503: {"unavailable", "not-ready"},
}


def assert_problem(resp: TestResponse, status: int, field: str | None = None) -> dict[str, Any]:
    """An RFC 9457 body with our members; ``field`` must be named in ``errors``."""
    assert resp.status_code == status, resp.get_data(as_text=True)
    assert resp.mimetype == "application/problem+json"
    body = resp.get_json()
    assert body["status"] == status
    assert body["type"].removeprefix(PROBLEM_BASE) in SLUGS[status], body["type"]
    assert body["title"] and body["detail"]
    assert body["instance"] == resp.request.path
    assert "Traceback" not in resp.get_data(as_text=True)
    if field is not None:
        fields = [e["field"] for e in body.get("errors", [])]
        assert field in fields, f"{field!r} not in {fields}"
    return body


def iris_batches(n_batches: int, seed: int = 0) -> list[tuple[np.ndarray, np.ndarray]]:
    """Labelled iris batches (scikit-learn's bundled copy of Fisher 1936)."""
    X, y = load_open("iris")
    return make_batches(X, y, n_batches, np.random.default_rng(seed),
                        classes_per_batch=(2, 3), group_size=(8, 20))


def as_records(X: np.ndarray, features: list[str] = IRIS_FEATURES) -> list[dict[str, float]]:
    return [dict(zip(features, map(float, row), strict=True)) for row in X]


def records_body(X: np.ndarray, labels: np.ndarray) -> dict[str, Any]:
    return {"records": as_records(X), "groups": [int(v) for v in labels]}


def columns_body(X: np.ndarray, labels: np.ndarray, order: list[int] | None = None) -> dict:
    """``columns`` + ``rows`` form, columns permuted by ``order`` (a valid choice)."""
    order = order or list(range(len(IRIS_FEATURES)))
    return {
        "columns": [IRIS_FEATURES[j] for j in order],
        "rows": X[:, order].tolist(),
        "groups": [f"g{v}" for v in labels],
    }


def post_batches(api: SpecClient, name: str, batches: list) -> list[str]:
    ids = []
    for X, labels in batches:
        resp = api.post(f"/v1/metrics/{name}/batches", json=records_body(X, labels))
        assert resp.status_code == 201, resp.get_json()
        ids.append(resp.get_json()["batch_id"])
    return ids


def stats_doc(X: np.ndarray, labels: np.ndarray,
              features: list[str] = IRIS_FEATURES) -> dict[str, Any]:
    """A ``likewise.batch-stats/1`` document computed with numpy from the records (the
    definitions of docs/batch-stats.md, written out directly)."""
    mean = X.mean(axis=0)
    C = X - mean
    between = np.zeros((X.shape[1], X.shape[1]))
    sizes = {}
    for g in np.unique(labels):
        rows = labels == g
        sizes[str(g)] = int(rows.sum())
        dm = X[rows].mean(axis=0) - mean
        between += rows.sum() * np.outer(dm, dm)
    return {"format": "likewise.batch-stats/1", "features": list(features),
            "n": int(X.shape[0]), "k": len(sizes), "group_sizes": sizes,
            "sums": X.sum(axis=0).tolist(), "scatter": (C.T @ C).tolist(),
            "between": between.tolist()}
