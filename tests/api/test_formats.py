"""CSV, Arrow IPC and Parquet bodies: the same table as JSON gives the same batch and the
same grouping; errors name the column and row; caps hold before a table unpacks.

Data: iris (Fisher 1936) as bundled with scikit-learn, and palmerpenguins (Gorman,
Williams & Fraser 2014) with its own missing values. Bodies are written with pyarrow,
the reference writer of each format.
"""

from __future__ import annotations

import io
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.parquet as pq
import pytest
from sklearn.metrics import adjusted_rand_score

from service.api import create_app
from service.context import Context

from .helpers import IRIS_FEATURES, assert_problem, iris_batches, records_body
from .spec import SpecClient

URL = "/v1/metrics/iris/batches"
CSV, ARROW, PARQUET = "text/csv", "application/vnd.apache.arrow.stream", \
    "application/vnd.apache.parquet"
FORMATS = [CSV, ARROW, PARQUET]


@pytest.fixture
def held_out() -> tuple[np.ndarray, np.ndarray]:
    """A fresh iris batch (Fisher 1936, scikit-learn's copy), drawn with another seed."""
    return iris_batches(1, seed=11)[0]


def encode(table: pa.Table, media: str) -> bytes:
    sink = io.BytesIO()
    if media == CSV:
        pa_csv.write_csv(table, sink)
    elif media == ARROW:
        with pa.ipc.new_stream(sink, table.schema) as writer:
            writer.write_table(table)
    else:
        pq.write_table(table, sink)
    return sink.getvalue()


def iris_table(X: np.ndarray, labels: Any = None, order: list[int] | None = None,
               **extra: list[Any]) -> pa.Table:
    order = order or list(range(4))
    cols = {IRIS_FEATURES[j]: X[:, j] for j in order}
    if labels is not None:
        cols["analyst_group"] = [int(v) for v in labels]
    cols.update(extra)
    return pa.table(cols)


def post(api: SpecClient, url: str, body: bytes, media: str, **query: Any):
    qs = "&".join(f"{k}={v}" for k, v in query.items())
    return api.post(f"{url}?{qs}" if qs else url, data=body, content_type=media)


@pytest.mark.parametrize("media", FORMATS)
def test_a_tabular_batch_is_the_json_batch(api: SpecClient, metric: str, media: str) -> None:
    """Same matrix and labels in another format → the same content hash, so it is
    refused as a duplicate of the JSON batch (columns in another order too)."""
    X, y = iris_batches(1)[0]
    first = api.post(URL, json=records_body(X, y))
    assert first.status_code == 201
    body = encode(iris_table(X, y, order=[3, 1, 0, 2]), media)
    again = post(api, URL, body, media, group_column="analyst_group")
    assert_problem(again, 409)
    assert again.get_json()["batch_id"] == first.get_json()["batch_id"]
    stored = post(api, URL, body, media, group_column="analyst_group", allow_duplicate="true")
    assert stored.status_code == 201, stored.get_json()
    assert stored.get_json()["sha256"] == first.get_json()["sha256"]
    assert stored.get_json()["records"] == len(X)


@pytest.mark.parametrize("media", FORMATS)
def test_tabular_groupings_match_json(api: SpecClient, fitted: dict, held_out,
                                      media: str) -> None:
    X, _ = held_out
    by_json = api.post("/v1/metrics/iris/groupings",
                       json={"records": [dict(zip(IRIS_FEATURES, map(float, r), strict=True))
                                         for r in X], "k": 3}).get_json()
    ids = [f"parcel-{i}" for i in range(len(X))]
    resp = post(api, "/v1/metrics/iris/groupings", encode(iris_table(X, parcel=ids), media),
                media, k=3, id_column="parcel")
    assert resp.status_code == 200, resp.get_json()
    got = resp.get_json()
    # label ids may differ between two runs of k-means; the partition must not
    assert adjusted_rand_score(by_json["labels"], got["labels"]) == pytest.approx(1.0)
    assert got["ids"] == ids and got["k"] == 3 and got["imputed"] == 0


def test_tabular_errors_name_the_column_and_row(api: SpecClient, metric: str,
                                                unchanged) -> None:
    X, y = iris_batches(1)[0]
    good = iris_table(X, y)
    text_cell = X[:, 1].astype(object)
    text_cell[5] = "n/a-ish"
    bad_value = iris_table(X, y).set_column(1, "sepal_width", pa.array(text_cell.astype(str)))
    with unchanged():
        # no group column named, or one the table lacks
        assert_problem(post(api, URL, encode(good, CSV), CSV), 422, "group_column")
        assert_problem(post(api, URL, encode(good, CSV), CSV, group_column="nope"), 422,
                       "group_column")
        body = assert_problem(post(api, URL, encode(bad_value, PARQUET), PARQUET,
                                   group_column="analyst_group"), 422, "sepal_width")
        assert body["errors"][0]["row"] == 5 and "row 5" in body["errors"][0]["message"]
        # a column the metric does not have
        extra = iris_table(X, y, colour=["red"] * len(X))
        assert_problem(post(api, URL, encode(extra, ARROW), ARROW,
                            group_column="analyst_group"), 422, "columns")
        # an infinite value
        inf = X.copy()
        inf[3, 2] = np.inf
        body = assert_problem(post(api, URL, encode(iris_table(inf, y), ARROW), ARROW,
                                   group_column="analyst_group"), 422, "petal_length")
        assert body["errors"][0]["row"] == 3
        # not the format it says
        assert_problem(post(api, URL, b"PAR1 not really", PARQUET, group_column="g"), 400)
        assert_problem(post(api, URL, b"\x00\x01garbage", ARROW, group_column="g"), 400)
        assert_problem(post(api, URL, b'a,b\n1,2,3\n"', CSV, group_column="a"), 400)
        # k and version go in a JSON grouping's body, not its query
        assert_problem(api.post("/v1/metrics/iris/groupings?k=2",
                                json={"records": [dict.fromkeys(IRIS_FEATURES, 1.0)]}),
                       422, "k")


@pytest.mark.parametrize("media", [ARROW, PARQUET])
def test_caps_hold_before_a_table_unpacks(api: SpecClient, ctx: Context, metric: str,
                                          unchanged, media: str) -> None:
    """A body far smaller than what it unpacks into is refused on its declared size."""
    n = 50_000
    zeros = pa.table({f: np.zeros(n) for f in IRIS_FEATURES} | {"g": np.arange(n) % 2})
    body = encode(zeros, media)
    small = Context.build(ctx.settings.replace(max_batch_records=n - 1), connection=ctx.redis)
    limited = SpecClient(create_app(context=small), ctx.settings.admin_token)
    with unchanged():
        assert_problem(post(limited, URL, body, media, group_column="g"), 413)


def test_extra_columns_ride_along_when_asked(api: SpecClient, metric: str) -> None:
    X, y = iris_batches(1)[0]
    ids = list(range(1000, 1000 + len(X)))
    table = iris_table(X, y, parcel_id=ids)
    assert_problem(post(api, URL, encode(table, CSV), CSV, group_column="analyst_group"),
                   422, "columns")
    ok = post(api, URL, encode(table, CSV), CSV, group_column="analyst_group",
              ignore_extra_columns="true")
    assert ok.status_code == 201, ok.get_json()
    # JSON records too: the id key is dropped, the batch is the one without it
    body = records_body(X, y)
    for record, i in zip(body["records"], ids, strict=True):
        record["parcel_id"] = i
    assert_problem(api.post(URL, json=body), 422, "records[0]")
    dup = api.post(f"{URL}?ignore_extra_columns=true", json=body)
    assert_problem(dup, 409)
    assert dup.get_json()["batch_id"] == ok.get_json()["batch_id"]


def test_large_json_is_parsed_in_the_helper_with_the_same_answers(api: SpecClient,
                                                                  metric: str,
                                                                  unchanged) -> None:
    """A JSON body over the offload size goes to the parser process: the same batch,
    the same problems (field names included) as an inline parse."""
    import json

    from service.api import offload

    X, y = iris_batches(1)[0]
    reps = 2 * (offload.OFFLOAD_BYTES // len(json.dumps(records_body(X, y))) + 1)
    big_X, big_y = np.vstack([X] * reps), np.concatenate([y] * reps)
    body = json.dumps(records_body(big_X, big_y))
    assert len(body) > offload.OFFLOAD_BYTES
    with unchanged():
        dup_at = len(big_X) - 2  # a record near the end repeats a key
        at = -1
        for _ in range(dup_at + 1):
            at = body.index('"petal_width"', at + 1)
        text = body[:at] + '"petal_width": 1.0, ' + body[at:]
        assert_problem(api.post(URL, data=text, content_type="application/json"), 422,
                       f"records[{dup_at}]")
        assert_problem(api.post(URL, data=body[:-5], content_type="application/json"), 400)
        assert_problem(api.post(URL, data=body.replace('"groups"', '"labels"'),
                                content_type="application/json"), 422, "groups")
    stored = api.post(URL, data=body, content_type="application/json")
    assert stored.status_code == 201, stored.get_json()
    assert offload._pool is not None  # it went through the helper
    assert stored.get_json()["sha256"] == _inline_hash(big_X, big_y)


def _inline_hash(X: np.ndarray, y: np.ndarray) -> str:
    """The content hash of the same batch parsed inline, in this process."""
    from service.tables import from_json
    from service.usecases.batches import content_hash

    table = from_json(records_body(X, y))
    return content_hash(table.matrix(IRIS_FEATURES).X, [int(v) for v in y])
