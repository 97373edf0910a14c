"""A metric with a categorical feature and mean imputation, fed with Parquet and fitted by
a real worker: the version reports the feature by level, and a grouping fills a gap
with the version's training mean.

Data: palmerpenguins (Gorman, Williams & Fraser 2014) with its own missing values;
species are the analysts' groups, island the categorical feature.
"""

from __future__ import annotations

import io
from collections.abc import Callable
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from palmerpenguins import load_penguins

from .helpers import assert_problem
from .spec import SpecClient

NUMERIC = ["bill_length_mm", "bill_depth_mm", "flipper_length_mm", "body_mass_g"]
ISLANDS = ["Biscoe", "Dream", "Torgersen"]
URL = "/v1/metrics/penguins"
PARQUET = "application/vnd.apache.parquet"


def _parquet(df) -> bytes:
    sink = io.BytesIO()
    pq.write_table(pa.Table.from_pandas(df, preserve_index=False), sink)
    return sink.getvalue()


@pytest.fixture
def penguin_version(api: SpecClient, fit_to_version: Callable[..., dict]) -> dict[str, Any]:
    resp = api.put(URL, json={"features": [*NUMERIC, "island"],
                              "categories": {"island": ISLANDS},
                              "missing_values": "impute_mean"})
    assert resp.status_code == 201, resp.get_json()
    assert resp.get_json()["categories"] == {"island": ISLANDS}
    df = load_penguins()[[*NUMERIC, "island", "species"]]
    assert df[NUMERIC].isna().to_numpy().sum() == 8  # two penguins were not measured
    rng = np.random.default_rng(3)
    order = rng.permutation(len(df))
    imputed = 0
    for part in np.array_split(order, 4):
        batch = df.iloc[part]
        got = api.post(f"{URL}/batches?group_column=species", data=_parquet(batch),
                       content_type=PARQUET)
        assert got.status_code == 201, got.get_json()
        assert got.get_json()["imputed"] == int(batch[NUMERIC].isna().to_numpy().sum())
        imputed += got.get_json()["imputed"]
    fit = fit_to_version("penguins")
    version = api.get(f"{URL}/versions/{fit['version']}").get_json()
    version["imputed_total"] = imputed
    return version


def test_the_version_reads_by_level_and_fills_gaps(api: SpecClient,
                                                   penguin_version: dict) -> None:
    metric = penguin_version["metric"]
    assert metric["features"] == [*NUMERIC, *(f"island={v}" for v in ISLANDS)]
    inputs = metric["inputs"]
    assert inputs["missing_values"] == "impute_mean"
    assert inputs["imputed_in_training"] == penguin_version["imputed_total"] > 0
    # a record without a bill length is grouped as if it had the training mean
    record = {"bill_length_mm": None, "bill_depth_mm": 18.0, "flipper_length_mm": 195.0,
              "body_mass_g": 3800.0, "island": "Dream"}
    filled = {**record, "bill_length_mm": metric["mean"][0]}
    pool = [{"bill_length_mm": 39.0 + i, "bill_depth_mm": 17.0 + i % 3,
             "flipper_length_mm": 190.0 + 3 * i, "body_mass_g": 3600.0 + 80 * i,
             "island": ISLANDS[i % 3]} for i in range(12)]
    with_gap = api.post(f"{URL}/groupings", json={"records": [*pool, record], "k": 3})
    assert with_gap.status_code == 200, with_gap.get_json()
    by_hand = api.post(f"{URL}/groupings", json={"records": [*pool, filled], "k": 3}).get_json()
    got = with_gap.get_json()
    assert got["imputed"] == 1 and got["imputed_by_feature"] == {"bill_length_mm": 1}
    assert got["distances"] == pytest.approx(by_hand["distances"])
    assert by_hand["imputed"] == 0
    # drift watch counts what the groupings filled in, beside the training batches' rate
    watch = api.get(f"{URL}/drift").get_json()
    assert watch["records"] == 2 * (len(pool) + 1) and watch["imputed"] == 1
    assert watch["imputed_per_record"] == pytest.approx(1 / watch["records"])
    assert watch["reference_imputed_per_record"] == pytest.approx(
        inputs["imputed_in_training"] / watch["reference_records"])
    # a level the metric does not know is named, with its row
    unknown = {**filled, "island": "Anvers"}
    body = assert_problem(api.post(f"{URL}/groupings", json={"records": [unknown], "k": 1}),
                          422, "records[0]")
    assert "Anvers" in body["detail"]


def test_categories_are_locked_with_the_features(api: SpecClient,
                                                 penguin_version: dict) -> None:
    changed = {"features": [*NUMERIC, "island"], "categories": {"island": ISLANDS[:2]},
               "missing_values": "impute_mean"}
    assert_problem(api.put(URL, json=changed), 409)
    # the missing-value policy is not part of the encoding: it may change
    relaxed = {**changed, "categories": {"island": ISLANDS}, "missing_values": "refuse"}
    assert api.put(URL, json=relaxed).status_code == 200
    bad = [{"features": ["a"], "categories": {"b": ["x"]}},
           {"features": ["a"], "categories": {"a": []}},
           {"features": ["a"], "categories": {"a": ["x", "x"]}},
           {"features": ["a", "a=x"], "categories": {"a": ["x"]}},
           {"features": ["a"], "missing_values": "guess"}]
    fields = ["categories.b", "categories", "categories.a", "categories", "missing_values"]
    for body, field in zip(bad, fields, strict=True):
        got = api.put("/v1/metrics/other", json=body)
        assert_problem(got, 422)
        named = [e["field"] for e in got.get_json()["errors"]]
        assert any(n.startswith(field) for n in named), (body, named)
