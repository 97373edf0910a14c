"""Request ids: on every answer, in problem bodies and in the request's log line."""

from __future__ import annotations

import logging
import re

import pytest

from .conftest import ADMIN_TOKEN
from .helpers import assert_problem
from .spec import SpecClient

GENERATED = re.compile(r"[0-9a-f]{32}")


def test_every_answer_carries_a_new_id(api: SpecClient) -> None:
    first = api.get("/healthz", auth=False).headers["X-Request-Id"]
    second = api.get("/v1/metrics").headers["X-Request-Id"]
    assert GENERATED.fullmatch(first) and GENERATED.fullmatch(second) and first != second


@pytest.mark.parametrize("given", ["etl-run-42", "a", "Z" * 64, "job:7.part_3-x"])
def test_a_well_formed_caller_id_is_kept(api: SpecClient, given: str) -> None:
    resp = api.get("/v1/metrics", headers={"X-Request-Id": given})
    assert resp.headers["X-Request-Id"] == given


@pytest.mark.parametrize("given", ["", "Z" * 65, "-leading", "has space", "semi;colon",
                                   "ünïcode", "a/b"])
def test_a_malformed_caller_id_is_replaced(api: SpecClient, given: str) -> None:
    resp = api.get("/v1/metrics", headers={"X-Request-Id": given})
    assert GENERATED.fullmatch(resp.headers["X-Request-Id"])


def test_problem_bodies_carry_the_id(api: SpecClient, unchanged) -> None:
    with unchanged():
        for resp in (api.get("/v1/metrics/nothing", headers={"X-Request-Id": "r-404"}),
                     api.get("/v1/metrics", auth=False, headers={"X-Request-Id": "r-401"}),
                     api.put("/v1/metrics/iris", json={"features": []},
                             headers={"X-Request-Id": "r-422"})):
            body = assert_problem(resp, resp.status_code)
            assert body["request_id"] == resp.headers["X-Request-Id"] == f"r-{resp.status_code}"


def test_the_request_log_line_names_id_route_status_and_metric(
    api: SpecClient, caplog: pytest.LogCaptureFixture
) -> None:
    with caplog.at_level(logging.INFO, logger="likewise.http"):
        api.get("/v1/metrics/nothing", headers={"X-Request-Id": "find-me"})
    (line,) = [r for r in caplog.records if r.name == "likewise.http"]
    assert (line.request_id, line.route, line.status, line.metric, line.principal) == (
        "find-me", "/v1/metrics/<name>", 404, "nothing", "admin")
    assert line.duration_ms >= 0
    assert line.getMessage() == "GET /v1/metrics/<name> 404"


def test_a_new_fit_is_named_in_its_log_line_and_no_token_is_logged(
    api: SpecClient, with_batches: list[str], caplog: pytest.LogCaptureFixture
) -> None:
    with caplog.at_level(logging.DEBUG):
        resp = api.post("/v1/metrics/iris/fits", json={})
        api.get("/v1/metrics", headers={"Authorization": "Bearer wrong-secret"})
    fit_id = resp.get_json()["fit_id"]
    http = [r for r in caplog.records if r.name == "likewise.http"]
    assert http[0].fit_id == fit_id and http[0].status == 202
    assert http[1].status == 401
    for record in caplog.records:
        text = repr(vars(record))
        assert ADMIN_TOKEN not in text and "wrong-secret" not in text
