"""Hostile bodies get a 4xx problem naming the field, and nothing is stored.

Data: iris (Fisher 1936) as bundled with scikit-learn.
"""

from __future__ import annotations

import io
import json

import numpy as np

from service.api.bodies import DRAIN_BYTES, SMALL_BODY
from service.config import MAX_FEATURES
from service.tables import MAX_INT_LABEL

from .helpers import IRIS_FEATURES, as_records, assert_problem, iris_batches, records_body
from .spec import SpecClient

URL = "/v1/metrics/iris/batches"


def _chunked(api: SpecClient, path: str, raw: bytes):
    """A body sent as a server does for ``Transfer-Encoding: chunked``: no length."""
    return api.post(path, input_stream=io.BytesIO(raw), content_type="application/json",
                    headers={"Transfer-Encoding": "chunked"},
                    environ_overrides={"wsgi.input_terminated": True, "CONTENT_LENGTH": ""})


def test_a_huge_feature_list_is_refused_by_its_count(api: SpecClient, unchanged) -> None:
    # the first name is invalid too: the count is checked before any name is looked at
    names = [7] + [f"f{i}" for i in range(MAX_FEATURES)]
    with unchanged():
        problem = assert_problem(api.put("/v1/metrics/wide", json={"features": names}),
                                 422, "features")
        assert [e["message"] for e in problem["errors"]] == [
            f"At most {MAX_FEATURES} items."]


def test_a_metric_body_over_the_small_limit_is_413(api: SpecClient, unchanged) -> None:
    body = json.dumps({"features": ["x" * 100] * (SMALL_BODY // 100)}).encode()
    assert len(body) > SMALL_BODY
    with unchanged():
        resp = api.put("/v1/metrics/wide", data=body, content_type="application/json")
        assert_problem(resp, 413)
        assert str(SMALL_BODY) in resp.get_json()["detail"]


def test_duplicate_keys_in_a_record_are_refused(api: SpecClient, metric: str,
                                                unchanged) -> None:
    X, y = iris_batches(1, seed=2)[0]
    records = [json.dumps(r) for r in as_records(X)]
    # record 1 gives its first feature twice, the second time with another value
    first = IRIS_FEATURES[0]
    records[1] = records[1][:-1] + f', "{first}": 99.0}}'
    raw = ('{"records": [' + ",".join(records) + '], "groups": '
           + json.dumps([int(v) for v in y]) + "}").encode()
    with unchanged():
        problem = assert_problem(api.post(URL, data=raw, content_type="application/json"),
                                 422, "records[1]")
        assert first in problem["detail"]
        # a key repeated in the envelope names the body
        clean = json.dumps(records_body(X, y)).encode()
        twice = clean[:-1] + b', "groups": [0]}'
        assert_problem(api.post(URL, data=twice, content_type="application/json"),
                       422, "body")


def test_a_chunked_body_over_the_limit_is_413(api: SpecClient, app, metric: str,
                                              unchanged) -> None:
    X, y = iris_batches(1, seed=3)[0]
    raw = json.dumps(records_body(X, y)).encode()
    app.config["MAX_CONTENT_LENGTH"] = len(raw) - 1
    with unchanged():
        assert_problem(_chunked(api, URL, raw), 413)
    app.config["MAX_CONTENT_LENGTH"] = len(raw)
    stored = _chunked(api, URL, raw)
    assert stored.status_code == 201, stored.get_json()
    assert stored.get_json()["records"] == len(X)


def test_whole_number_labels_are_bounded(api: SpecClient, metric: str, unchanged) -> None:
    X, y = iris_batches(1, seed=4)[0]
    body = records_body(X, y)
    huge = int("9" * 400)
    with unchanged():
        resp = api.post(URL, json={**body, "groups": [huge] + body["groups"][1:]})
        assert_problem(resp, 422, "groups")
        resp = api.post(URL, json={**body, "groups": [-MAX_INT_LABEL - 1] + body["groups"][1:]})
        assert_problem(resp, 422, "groups")
    edge = [MAX_INT_LABEL if g == body["groups"][0] else g for g in body["groups"]]
    assert api.post(URL, json={**body, "groups": edge}).status_code == 201


class _Trickle(io.RawIOBase):
    """A WSGI input that hands out at most ``step`` bytes a read, as a socket may."""

    def __init__(self, raw: bytes, step: int) -> None:
        self._data, self._step, self.reads = io.BytesIO(raw), step, 0

    def readable(self) -> bool:
        return True

    def seekable(self) -> bool:  # the test client measures the stream first
        return True

    def seek(self, offset: int, whence: int = 0) -> int:
        return self._data.seek(offset, whence)

    def tell(self) -> int:
        return self._data.tell()

    def read(self, size: int = -1) -> bytes:
        self.reads += 1
        return self._data.read(self._step if size < 0 else min(size, self._step))


def test_a_body_read_in_parts_is_stored_whole(api: SpecClient, metric: str) -> None:
    X, y = iris_batches(1, seed=4)[0]
    raw = json.dumps(records_body(X, y)).encode()
    stream = _Trickle(raw, 1000)
    stored = api.post(URL, input_stream=stream, content_type="application/json",
                      environ_overrides={"CONTENT_LENGTH": str(len(raw))})
    assert stored.status_code == 201, stored.get_json()
    assert stored.get_json()["records"] == len(X)
    assert stream.reads >= len(raw) // 1000


def test_a_body_shorter_than_its_length_is_400(api: SpecClient, metric: str,
                                               unchanged) -> None:
    X, y = iris_batches(1, seed=5)[0]
    raw = json.dumps(records_body(X, y)).encode()
    with unchanged():
        assert_problem(api.post(URL, input_stream=_Trickle(raw[:-10], 1000),
                                content_type="application/json",
                                environ_overrides={"CONTENT_LENGTH": str(len(raw))}), 400)


def test_a_declared_length_over_the_limit_is_413_before_it_is_read(
        api: SpecClient, app, metric: str, unchanged) -> None:
    X, y = iris_batches(1, seed=6)[0]
    reps = DRAIN_BYTES // len(json.dumps(records_body(X, y))) + 2
    raw = json.dumps(records_body(np.tile(X, (reps, 1)), np.tile(y, reps))).encode()
    app.config["MAX_CONTENT_LENGTH"] = len(raw) - 1
    stream = _Trickle(raw, 1000)
    with unchanged():
        assert_problem(api.post(URL, input_stream=stream, content_type="application/json",
                                environ_overrides={"CONTENT_LENGTH": str(len(raw))}), 413)
    assert stream.tell() <= DRAIN_BYTES < len(raw)  # at most the bounded drain was read
