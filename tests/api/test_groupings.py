"""``POST /v1/metrics/{name}/groupings``: grouping held-out records, cache vs activations."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pytest
from sklearn.metrics import adjusted_rand_score

from service.api import create_app
from service.context import Context
from service.usecases.backlog import BACKLOG

from .helpers import IRIS_FEATURES, as_records, assert_problem, iris_batches
from .spec import SpecClient

URL = "/v1/metrics/iris/groupings"


@pytest.fixture
def held_out() -> tuple[np.ndarray, np.ndarray]:
    """A fresh iris batch (Fisher 1936, scikit-learn's copy), drawn with another seed."""
    return iris_batches(1, seed=11)[0]


def test_grouping_with_the_active_version(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], held_out, unchanged
) -> None:
    X, truth = held_out
    k = len(set(truth.tolist()))
    drift_keys = ctx.storage.keys.metric("iris", "drift", "")
    with unchanged(but=drift_keys):  # grouping stores only its drift summary
        resp = api.post(URL, json={"records": as_records(X), "k": k})
    assert resp.status_code == 200
    assert BACKLOG.flush()  # the summary is written after the answer
    assert len(list(ctx.redis.scan_iter(match=drift_keys + "*"))) == 1  # one hourly bucket
    g = resp.get_json()
    assert (g["version"], g["k"], g["k_chosen"]) == (1, k, False)
    assert len(g["labels"]) == len(g["distances"]) == len(g["margins"]) == len(X)
    assert sum(g["sizes"]) == len(X) and len(g["sizes"]) == k
    assert np.bincount(g["labels"], minlength=k).tolist() == g["sizes"]
    # Label-invariant agreement (Hubert & Arabie 1985 ARI, scikit-learn's implementation).
    # 0.5 is a sanity floor for iris species (rule of thumb, common practice, no source).
    assert adjusted_rand_score(truth, g["labels"]) > 0.5


def test_the_drift_summary_is_handed_off_only_once_the_answer_is_closed(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], held_out
) -> None:
    """The server closes an answer after its last byte has gone (gunicorn does, as
    the WSGI spec asks): only then does the request's drift summary reach the backlog."""
    X, truth = held_out
    drift_keys = ctx.storage.keys.metric("iris", "drift", "")
    resp = api.post(URL, json={"records": as_records(X), "k": len(set(truth.tolist()))})
    assert resp.status_code == 200 and resp.get_json()["version"] == 1
    assert BACKLOG.held() == 1  # the answer is in hand, not closed: the summary waits
    resp.close()
    assert BACKLOG.held() == 0
    assert BACKLOG.flush()
    assert len(list(ctx.redis.scan_iter(match=drift_keys + "*"))) == 1


def test_columns_form_auto_k_and_explicit_version(
    api: SpecClient, fitted: dict[str, Any], held_out
) -> None:
    X, _ = held_out
    order = [3, 1, 0, 2]
    body = {"columns": [IRIS_FEATURES[j] for j in order], "rows": X[:, order].tolist()}
    auto = api.post(URL, json={**body, "k": "auto", "version": 1}).get_json()
    assert auto["k_chosen"] is True and auto["version"] == 1
    default = api.post(URL, json=body).get_json()
    assert default["k_chosen"] is True and default["k"] == auto["k"]
    # Same records in the records form, same k → the same partition.
    by_records = api.post(URL, json={"records": as_records(X), "k": auto["k"]}).get_json()
    assert adjusted_rand_score(by_records["labels"], auto["labels"]) == pytest.approx(1.0)


def test_grouping_follows_activations(
    api: SpecClient, fitted: dict[str, Any], fit_to_version: Callable[..., dict], held_out
) -> None:
    fit_to_version("iris", method="euclidean", activate="by_hand")
    body = {"records": as_records(held_out[0]), "k": 3}
    assert api.post(URL, json=body).get_json()["version"] == 1
    api.put("/v1/metrics/iris/active", json={"version": 2, "reason": "compare"})
    assert api.post(URL, json=body).get_json()["version"] == 2
    api.put("/v1/metrics/iris/active", json={"version": 1, "reason": "roll back"})
    assert api.post(URL, json=body).get_json()["version"] == 1
    assert api.post(URL, json={**body, "version": 2}).get_json()["version"] == 2


def test_a_single_group_has_null_margins(api: SpecClient, fitted: dict[str, Any], held_out):
    """k = 1 has no runner-up centre: margins are JSON null, never the invalid ``Infinity``."""
    X, _ = held_out
    resp = api.post(URL, json={"records": as_records(X), "k": 1})
    assert resp.status_code == 200
    body = resp.get_json()
    assert body["k"] == 1 and body["sizes"] == [len(X)]
    assert body["margins"] == [None] * len(X)
    assert b"Infinity" not in resp.data


# ------------------------------------------------------------------------- errors
def test_metric_without_a_version_is_409(
    api: SpecClient, with_batches: list[str], held_out, unchanged
) -> None:
    with unchanged():
        assert_problem(api.post(URL, json={"records": as_records(held_out[0])}), 409)


def _invalid(X: np.ndarray) -> list[tuple[dict, str]]:
    """Bodies that must be a 422, with the field each must name."""
    recs = as_records(X)
    return [
        ({}, "records"),
        ({"records": recs, "k": 0}, "k"),
        ({"records": recs, "k": "many"}, "k"),
        ({"records": recs, "k": True}, "k"),
        ({"records": recs, "k": 2.5}, "k"),
        ({"records": recs, "k": len(recs) + 1}, "k"),
        ({"records": recs, "version": 0}, "version"),
        ({"records": recs, "version": "1"}, "version"),
        ({"records": recs, "groups": [0] * len(recs)}, "groups"),
        ({"records": [{"sepal_length": 1.0}]}, "records[0]"),
        ({"columns": IRIS_FEATURES[:3], "rows": X[:, :3].tolist()}, "columns"),
        ({"columns": IRIS_FEATURES, "rows": [[1, 2, 3]]}, "rows[0]"),
        ({"columns": IRIS_FEATURES}, "rows"),
        # finite but too large once rescaled by the metric: k-means refused them (a 500)
        # and k=1 answered distances of Infinity (found by schemathesis-driven probing)
        ({"records": [dict.fromkeys(IRIS_FEATURES, 1e308)] * 3, "k": 2}, "records[0]"),
        ({"records": [dict.fromkeys(IRIS_FEATURES, -1e308)] * 3, "k": 1}, "records[0]"),
        ({"columns": IRIS_FEATURES, "rows": [X[0].tolist(), [1e308] * 4], "k": 1}, "rows[1]"),
    ]


MALFORMED = [
    {"data": '{"records": [', "content_type": "application/json"},
    {"json": "records"},
]


def test_every_error_of_a_fitted_metric(
    api: SpecClient, ctx: Context, fitted: dict[str, Any], held_out, unchanged
) -> None:
    """One fit, then each error case in turn (a fit per case would be slow)."""
    X, _ = held_out
    records = as_records(X)
    with unchanged():
        assert_problem(api.post("/v1/metrics/nothing/groupings", json={"records": records}), 404)
        assert_problem(api.post(URL, json={"records": records, "version": 4}), 404)
        for kwargs in MALFORMED:
            assert_problem(api.post(URL, **kwargs), 400)
        # a body in no format this endpoint reads
        assert_problem(api.post(URL, data='{"records": []}'), 415)
        assert_problem(api.post(URL, data="a,b\n1,2\n", content_type="text/plain"), 415)
        for body, field in _invalid(X):
            assert_problem(api.post(URL, json=body), 422, field)
    small = Context.build(ctx.settings.replace(max_batch_records=len(X) - 1),
                          connection=ctx.redis)
    limited = SpecClient(create_app(context=small), ctx.settings.admin_token)
    with unchanged():
        assert_problem(limited.post(URL, json={"records": records}), 413, "records")
    # k is capped per request (LIKEWISE_MAX_GROUPS): k-means costs grow with k·n
    capped = Context.build(ctx.settings.replace(max_groups=3), connection=ctx.redis)
    capped_api = SpecClient(create_app(context=capped), ctx.settings.admin_token)
    with unchanged():
        assert_problem(capped_api.post(URL, json={"records": records, "k": 4}), 422, "k")
    assert capped_api.post(URL, json={"records": records, "k": 3}).status_code == 200
