"""A version's explanation by feature name, checked against numpy on the stored matrix."""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.testing import assert_allclose

from .helpers import IRIS_FEATURES, assert_problem
from .spec import SpecClient

BASE = "/v1/metrics/iris/versions"


def test_explanation_matches_numpy_on_the_stored_matrix(
    api: SpecClient, fitted: dict[str, Any]
) -> None:
    version = api.get(f"{BASE}/1").get_json()
    got = api.get(f"{BASE}/1/explanation").get_json()
    assert list(got["features"]) == IRIS_FEATURES  # keyed by name, in feature order
    stored = version["metric"]
    M = np.asarray(stored["matrix"])
    L = np.asarray(stored["components"])
    s, mu = np.asarray(stored["scales"]), np.asarray(stored["mean"])
    # reference: numpy on the stored matrix. Distance in original units is
    # Δxᵀ D⁻¹ M D⁻¹ Δx with D = diag(s), so a unit step along j alone costs √(M_jj)/s_j
    weight = [got["features"][f]["weight"] for f in IRIS_FEATURES]
    assert_allclose(weight, np.sqrt(np.diag(M)) / s, rtol=1e-12)
    assert_allclose(weight, np.linalg.norm(L / s, axis=0), rtol=1e-12)  # ‖L[:, j]‖ / s_j
    share = [got["features"][f]["share"] for f in IRIS_FEATURES]
    assert_allclose(share, np.diag(M) / np.trace(M), rtol=1e-12)
    assert_allclose(sum(share), 1.0)
    assert_allclose([got["features"][f]["scale"] for f in IRIS_FEATURES], s)
    assert_allclose([got["features"][f]["mean"] for f in IRIS_FEATURES], mu)
    # the weight is what the learned map does to one unit of the feature
    x = mu.copy()
    for j, f in enumerate(IRIS_FEATURES):
        step = x.copy()
        step[j] += 1.0
        z = L @ ((np.stack([x, step]) - mu) / s).T
        assert_allclose(np.linalg.norm(z[:, 1] - z[:, 0]), got["features"][f]["weight"])

    # directions: numpy's eigendecomposition of the stored M, largest first
    vals, vecs = np.linalg.eigh(M)
    order = np.argsort(vals)[::-1]
    dirs = got["directions"]
    assert 1 <= len(dirs) <= min(10, version["rank"])
    for i, d in enumerate(dirs):
        assert_allclose(d["strength"], vals[order[i]], rtol=1e-9)
        assert_allclose(d["share"], vals[order[i]] / np.trace(M), rtol=1e-9)
        v = np.array([d["loadings"][f] for f in IRIS_FEATURES])
        assert_allclose(abs(v @ vecs[:, order[i]]), 1.0, atol=1e-9)  # same axis
        assert v[np.abs(v).argmax()] > 0  # signed: largest loading positive

    # held-out ARI per fold, winner and Euclidean, from the selector's fold reports
    report = version["report"]
    assert len(got["folds"]) == len(report["folds"])
    for mine, fold in zip(got["folds"], report["folds"], strict=True):
        scores = {(c["method"], c["alpha"]): c["ari"] for c in fold["scores"]}
        assert mine["ari"] == scores[(report["method"], report["alpha"])]
        assert mine["baseline_ari"] == scores[("euclidean", 0.0)]
        assert mine["held_out"] == fold["held_out"]
    # not rounded: the fold means average to the report's score (mean over batches,
    # so compare loosely when folds score different numbers of batches)
    assert got["score"] == report["score"]
    aris = [f["ari"] for f in got["folds"]]
    assert any(a != round(a, 4) for a in aris + weight)


def test_explanation_errors(api: SpecClient, fitted: dict[str, Any], unchanged) -> None:
    with unchanged():
        assert_problem(api.get(f"{BASE}/9/explanation"), 404)
        assert_problem(api.get(f"{BASE}/0/explanation"), 422, "version")
        assert_problem(api.get("/v1/metrics/nothing/versions/1/explanation"), 404)
