"""openapi.yaml is valid OpenAPI 3.1 and documents exactly the routes the app serves."""

from __future__ import annotations

import json

import pytest
from openapi_spec_validator import validate
from werkzeug.wrappers import Response

from service.api import create_app
from service.config import Settings

from .spec import SpecChecker, app_operations, load_spec, spec_operations


def _app_without_redis():
    # create_app connects nothing, so a URL nobody listens on is fine here.
    return create_app(Settings(redis_url="redis://127.0.0.1:1/0", admin_token="x"))


def test_spec_is_valid_openapi_31() -> None:
    spec = load_spec()
    assert spec["openapi"].startswith("3.1")
    validate(spec)  # raises on any violation of the OpenAPI 3.1 schema


def test_every_route_is_documented_and_every_documented_route_exists() -> None:
    served = app_operations(_app_without_redis())
    documented = spec_operations(load_spec())
    assert served - documented == set(), "routes missing from openapi.yaml"
    assert documented - served == set(), "operations in openapi.yaml the app does not serve"


def test_v1_operations_require_bearer_and_probes_do_not() -> None:
    spec = load_spec()
    bearer = spec["components"]["securitySchemes"]["bearer"]
    assert (bearer["type"], bearer["scheme"]) == ("http", "bearer")
    assert spec["security"] == [{"bearer": []}]
    for path, item in spec["paths"].items():
        for method, op in item.items():
            if method == "parameters":
                continue
            if path.startswith("/v1/"):
                assert "security" not in op, f"{method} {path} must inherit bearer auth"
                assert "401" in op["responses"], f"{method} {path} must document 401"
            elif path.startswith("/console/parts/"):  # the console's data, guarded alike
                assert op.get("security") == [{"bearer": []}], f"{method} {path}"
                assert "401" in op["responses"], f"{method} {path} must document 401"
            else:
                assert op.get("security") == [], f"{method} {path} is meant to be open"


def test_spec_enums_follow_the_code() -> None:
    """Learners, activation policies and fit states are listed once in code; the spec
    must say the same (adding a learner to the core must show up here)."""
    from service.core import METHODS
    from service.core.drift import VERDICTS
    from service.usecases import fits, grouping_runs

    schemas = load_spec()["components"]["schemas"]
    assert schemas["FitMethod"]["enum"] == ["auto", *METHODS]
    assert schemas["LearnedMethod"]["enum"] == list(METHODS)
    assert schemas["ActivatePolicy"]["enum"] == list(fits.ACTIVATE)
    assert schemas["FitStatus"]["enum"] == list(fits.STATUSES)
    assert schemas["DriftVerdict"]["enum"] == list(VERDICTS)
    assert schemas["GroupingRunStatus"]["enum"] == list(grouping_runs.STATUSES)


# the queue library's own words for job and worker states and its registries (RQ's
# JobStatus and WorkerStatus values, its registry names); from rq's source, rq 2.x
QUEUE_LIBRARY_WORDS = {"queued", "started", "finished", "deferred", "scheduled", "canceled",
                       "stopped", "idle", "busy", "suspended", "registry", "burst"}


def _enums(node: object) -> list[str]:
    if isinstance(node, dict):
        found = [str(v) for v in node.get("enum", [])] if isinstance(node.get("enum"), list) else []
        return found + [e for v in node.values() for e in _enums(v)]
    if isinstance(node, list):
        return [e for v in node for e in _enums(v)]
    return []


def test_no_state_the_spec_shows_is_a_queue_library_word() -> None:
    spec = load_spec()
    assert set(_enums(spec)) & QUEUE_LIBRARY_WORDS == set()
    overview = spec["components"]["schemas"]["QueueOverview"]["properties"]
    counts = overview["queues"]["items"]["properties"]
    assert set(counts) & QUEUE_LIBRARY_WORDS == set()


def test_every_error_response_is_problem_json() -> None:
    spec = load_spec()
    responses = spec["components"]["responses"]
    for path, item in spec["paths"].items():
        for method, op in item.items():
            if method == "parameters":
                continue
            for status, resp in op["responses"].items():
                if int(status) < 400:
                    continue
                if "$ref" in resp:
                    resp = responses[resp["$ref"].rsplit("/", 1)[1]]
                assert list(resp["content"]) == ["application/problem+json"], (
                    f"{method} {path} {status}"
                )


def _response(body: object, status: int = 200, mime: str = "application/json") -> Response:
    return Response(json.dumps(body), status=status, mimetype=mime)


def test_the_response_checker_is_not_vacuous() -> None:
    """The oracle every API test relies on rejects wrong bodies, statuses and types."""
    checker = SpecChecker(load_spec())
    good = {"metrics": [], "next_cursor": None}
    checker.check_response("/v1/metrics", "get", _response(good))
    wrong = [
        _response({**good, "metrics": [{"name": "x"}]}),  # a metric without its members
        _response({**good, "extra": 1}),  # an undocumented member
        _response(good, status=201),  # an undocumented status
        _response(good, mime="text/html"),  # an undocumented media type
        _response({"title": "no"}, status=401, mime="application/problem+json"),
    ]
    for resp in wrong:
        with pytest.raises(AssertionError):
            checker.check_response("/v1/metrics", "get", resp)
