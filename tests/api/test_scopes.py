"""Who may do what: every /v1 route against every scope, metric-restricted tokens,
hashed tokens from a file, and who is recorded. Real Redis; fits on real workers.

Data: iris (Fisher 1936) as bundled with scikit-learn.
"""

from __future__ import annotations

import json
from typing import Any

import pytest

from service.api import create_app
from service.api.auth import SCOPE_OF
from service.context import Context
from service.tokens import SCOPES, digest

from .helpers import IRIS_FEATURES, assert_problem, iris_batches, records_body
from .spec import SpecClient, openapi_path

SCOPE_TOKENS = {scope: f"token-for-{scope}" for scope in SCOPES}
FILE_TOKEN = "token-from-the-file"
NO_RUN = "0" * 20  # a grouping run id nobody holds


@pytest.fixture
def scoped(ctx: Context, tmp_path, fitted: dict[str, Any]) -> tuple[Any, dict[str, Any]]:
    """The app with one token per scope, and a file token limited to ``iris*``."""
    book = tmp_path / "tokens.json"
    book.write_text(json.dumps({"tokens": [
        {"name": "iris-team", "sha256": digest(FILE_TOKEN), "scopes": list(SCOPES),
         "metrics": ["iris*"]}]}))
    settings = ctx.settings.replace(
        tokens={f"only-{s}": f"{t}:{s}" for s, t in SCOPE_TOKENS.items()},
        token_file=str(book))
    app = create_app(context=Context.build(settings, connection=ctx.redis))
    return app, fitted


def _body(body: Any) -> dict[str, Any]:
    return {} if body is None else {"json": body}


def _requests(fit_id: str, batch_id: str) -> dict[str, tuple[str, str, Any]]:
    X, y = iris_batches(1, seed=42)[0]
    return {
        "v1.metrics.list_metrics": ("GET", "/v1/metrics", None),
        "v1.metrics.get_metric": ("GET", "/v1/metrics/iris", None),
        "v1.metrics.put_metric": ("PUT", "/v1/metrics/fresh", {"features": ["a"]}),
        "v1.metrics.delete_metric": ("DELETE", "/v1/metrics/nothing-here", None),
        "v1.batches.add_batch": ("POST", "/v1/metrics/iris/batches", records_body(X, y)),
        "v1.batches.list_batches": ("GET", "/v1/metrics/iris/batches", None),
        "v1.batches.get_batch": ("GET", f"/v1/metrics/iris/batches/{batch_id}", None),
        "v1.batches.delete_batch": ("DELETE", "/v1/metrics/iris/batches/0000000000000000",
                                    None),
        "v1.fits.request_fit": ("POST", "/v1/metrics/iris/fits", {"method": "diagonal"}),
        "v1.fits.list_fits": ("GET", "/v1/fits", None),
        "v1.fits.get_fit": ("GET", f"/v1/fits/{fit_id}", None),
        "v1.fits.retry_fit": ("POST", f"/v1/fits/{fit_id}/retry", None),
        "v1.versions.list_versions": ("GET", "/v1/metrics/iris/versions", None),
        "v1.versions.get_version": ("GET", "/v1/metrics/iris/versions/1", None),
        "v1.versions.explain_version": ("GET", "/v1/metrics/iris/versions/1/explanation", None),
        "v1.versions.activate": ("PUT", "/v1/metrics/iris/active",
                                 {"version": 1, "reason": "matrix"}),
        "v1.versions.history": ("GET", "/v1/metrics/iris/history", None),
        "v1.groupings.group": ("POST", "/v1/metrics/iris/groupings",
                               {"records": records_body(X, y)["records"], "k": 3}),
        "v1.grouping_runs.start_run": ("POST", "/v1/metrics/iris/grouping-runs",
                                       {"records": records_body(X, y)["records"], "k": 3}),
        "v1.grouping_runs.get_run": ("GET", f"/v1/metrics/iris/grouping-runs/{NO_RUN}", None),
        "v1.grouping_runs.results": ("GET", f"/v1/metrics/iris/grouping-runs/{NO_RUN}/results",
                                     None),
        "v1.grouping_runs.delete_run": ("DELETE", f"/v1/metrics/iris/grouping-runs/{NO_RUN}",
                                        None),
        "v1.drift.drift_report": ("GET", "/v1/metrics/iris/drift", None),
        "v1.queues.queues": ("GET", "/v1/queues", None),
        "console.parts.overview": ("GET", "/console/parts/overview", None),
        "console.parts.metric": ("GET", "/console/parts/metrics/iris", None),
    }


def test_every_v1_route_needs_a_known_scope(scoped) -> None:
    app, _ = scoped
    guarded = ("/v1", "/console/parts")  # the console's data parts are guarded alike
    endpoints = {r.endpoint for r in app.url_map.iter_rules() if r.rule.startswith(guarded)}
    assert endpoints == set(SCOPE_OF)
    assert set(SCOPE_OF.values()) == set(SCOPES)


def test_route_by_scope_matrix(scoped, ctx: Context, unchanged) -> None:
    app, fitted = scoped
    admin = SpecClient(app, "test-admin-token")
    batch_id = admin.get("/v1/metrics/iris/batches").get_json()["batches"][0]["batch_id"]
    requests = _requests(fitted["fit_id"], batch_id)
    assert set(requests) == set(SCOPE_OF)
    for endpoint, (method, path, body) in requests.items():
        needed = SCOPE_OF[endpoint]
        for scope, token in SCOPE_TOKENS.items():
            api = SpecClient(app, token)
            if scope == needed:
                resp = api.open(method, path, **_body(body))
                assert resp.status_code != 403, (endpoint, scope, resp.get_json())
                continue
            with unchanged():
                resp = api.open(method, path, **_body(body))
                problem = assert_problem(resp, 403)
            assert problem["missing_scope"] == needed, (endpoint, scope)
            assert repr(needed) in problem["detail"]


def test_a_token_limited_to_some_metrics(scoped, ctx: Context, unchanged,
                                         run_worker_burst) -> None:
    app, fitted = scoped
    admin = SpecClient(app, "test-admin-token")
    assert admin.put("/v1/metrics/other", json={"features": IRIS_FEATURES}).status_code == 201
    team = SpecClient(app, FILE_TOKEN)
    assert team.get("/v1/metrics/iris").status_code == 200
    assert [m["name"] for m in team.get("/v1/metrics").get_json()["metrics"]] == ["iris"]
    X, y = iris_batches(1, seed=43)[0]
    with unchanged():
        for method, path, body in [
            ("GET", "/v1/metrics/other", None),
            ("POST", "/v1/metrics/other/batches", records_body(X, y)),
            ("DELETE", "/v1/metrics/other", None),
            ("PUT", "/v1/metrics/outside", {"features": ["a"]}),
        ]:
            problem = assert_problem(team.open(method, path, **_body(body)), 403)
            assert "missing_scope" not in problem
    # a fit of a metric outside the list is out of reach too, and not listed
    for Xb, yb in iris_batches(2, seed=44):
        admin.post("/v1/metrics/other/batches", json=records_body(Xb, yb))
    other = admin.post("/v1/metrics/other/fits", json={}).get_json()
    assert_problem(team.get(f"/v1/fits/{other['fit_id']}"), 403)
    assert {f["metric"] for f in team.get("/v1/fits").get_json()["fits"]} == {"iris"}
    # the file token acts, and history records its name
    resp = team.put("/v1/metrics/iris/active", json={"version": 1, "reason": "team"})
    assert resp.status_code == 200
    last = admin.get("/v1/metrics/iris/history").get_json()["history"][-1]
    assert (last["who"], last["reason"]) == ("iris-team", "team")


def test_the_token_file_holds_hashes_only(scoped, tmp_path) -> None:
    text = (tmp_path / "tokens.json").read_text()
    assert FILE_TOKEN not in text and digest(FILE_TOKEN) in text
    app, _ = scoped
    assert SpecClient(app, FILE_TOKEN).get("/v1/metrics/iris").status_code == 200
    assert_problem(SpecClient(app, digest(FILE_TOKEN)).get("/v1/metrics"), 401)


def test_routes_in_the_spec_document_403() -> None:
    from .spec import load_spec

    spec = load_spec()
    for path, item in spec["paths"].items():
        for method, op in item.items():
            if path.startswith("/v1") and isinstance(op, dict) and "responses" in op:
                assert "403" in op["responses"], (method, path)
    assert openapi_path("/v1/fits/<fit_id>") in spec["paths"]
