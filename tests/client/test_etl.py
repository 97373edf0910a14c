"""The ETL side of the client: statistics computed with pandas and with Dask, Arrow
bodies, statistics-only batches, grouping a DataFrame, the fit progress bar.

Data: scikit-learn's bundled wine data set (Forina et al.), cut into labelled batches
by tests/datasets.py. Reference for the statistics: numpy on the stacked records
(``tests.api.helpers.stats_doc``) and the service's own ``BatchStats.from_batch``.
Dask runs on its threaded scheduler (two threads: this machine has two cores).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from likewise_client import ARROW, ProblemError
from likewise_client.batch_stats import partial, stats_from_dask, stats_from_frame
from service.batch_stats import from_wire
from service.core import BatchStats
from tests.api.helpers import stats_doc
from tests.datasets import load_open, make_batches

FEATURES = [f"f{j}" for j in range(13)]
# float tolerance: the client and the service sum in different orders (partitions,
# centring first); both are within a few ulps of the scale of each matrix
RTOL, ATOL_SCALE = 1e-10, 1e-11


@pytest.fixture(scope="module")
def batches():
    X, y = load_open("wine")
    return make_batches(X, y, 6, np.random.default_rng(5), classes_per_batch=(2, 3))


def frame_of(batches, with_batch_column=False):
    parts = []
    for b, (X, y) in enumerate(batches):
        df = pd.DataFrame(X, columns=FEATURES)
        df["cause"] = [f"c{v}" for v in y]
        if with_batch_column:
            df["batch"] = b
        parts.append(df)
    out = pd.concat(parts, ignore_index=True)
    out.insert(0, "shipment_id", [f"s{i:05d}" for i in range(len(out))])
    return out


def assert_same_stats(doc, X, labels):
    labels = [f"c{v}" for v in labels]
    ref = stats_doc(X, np.asarray(labels), FEATURES)  # numpy on the records
    for key in ("n", "k", "group_sizes", "features", "format"):
        assert doc[key] == ref[key], key
    for key in ("sums", "scatter", "between"):
        want = np.asarray(ref[key])
        assert_allclose(doc[key], want, rtol=RTOL, atol=ATOL_SCALE * np.abs(want).max())
    got, _ = from_wire(doc, FEATURES)
    own = BatchStats.from_batch(X, labels)
    assert got.allclose(own, rtol=RTOL, atol=ATOL_SCALE * np.abs(own.G).max())


def test_pandas_statistics_equal_numpy_and_the_service(batches):
    df = frame_of(batches[:1])
    assert_same_stats(stats_from_frame(df, FEATURES, "cause"), *batches[0])


def test_dask_statistics_equal_numpy_and_the_service(batches):
    dd = pytest.importorskip("dask.dataframe")
    X = np.vstack([x for x, _ in batches])
    y = np.concatenate([v for _, v in batches])
    ddf = dd.from_pandas(frame_of(batches), npartitions=7)
    doc = stats_from_dask(ddf, FEATURES, "cause", split_every=2, scheduler="threads",
                          num_workers=2)
    assert_same_stats(doc, X, y)


def test_dask_one_batch_per_key(batches):
    dd = pytest.importorskip("dask.dataframe")
    ddf = dd.from_pandas(frame_of(batches, with_batch_column=True), npartitions=4)
    docs = stats_from_dask(ddf, FEATURES, "cause", by="batch", scheduler="threads",
                           num_workers=2)
    assert sorted(docs) == list(range(len(batches)))
    for b, (X, y) in enumerate(batches):
        assert_same_stats(docs[b], X, y)


def test_merging_keeps_precision_under_a_large_offset(batches):
    """A feature far from zero (1e8 + wine values): parts centred on their own means
    merge without losing the spread (the reference centres the stacked records)."""
    X, y = batches[0]
    X = X + 1e8
    halves = np.array_split(np.arange(len(y)), 3)
    merged = partial(X[halves[0]], y[halves[0]])
    for h in halves[1:]:
        merged = merged.merge(partial(X[h], y[h]))
    doc = merged.to_doc(FEATURES)
    ref = stats_doc(X, y, FEATURES)
    for key in ("scatter", "between"):
        want = np.asarray(ref[key])
        assert_allclose(doc[key], want, rtol=1e-6, atol=1e-6 * np.abs(want).max())


def test_missing_values_are_refused_naming_the_cell(batches):
    df = frame_of(batches[:1])
    df.loc[3, "f2"] = np.nan
    with pytest.raises(ValueError, match=r"row 3, column 'f2'"):
        stats_from_frame(df, FEATURES, "cause")


def test_fit_from_statistics_and_arrow_batches_gives_the_all_raw_matrix(
        live, metric_name, batches, capsys):
    frame = frame_of(batches, with_batch_column=True)
    params = {"method": "discriminant", "alphas": [0.1], "activate": "at_once", "seed": 0}
    with live.client() as lw:
        lw.put_metric(metric_name, FEATURES)
        for _, part in frame.groupby("batch"):
            made = lw.post_batch(metric_name, part[[*FEATURES, "cause"]], "cause",
                                 content_type=ARROW)
            assert made["kind"] == "records"
        fit = lw.wait_for_fit(lw.start_fit(metric_name, **params)["fit_id"], timeout=120,
                              progress_bar=True)
        assert fit["status"] == "succeeded", fit
        all_raw = lw.get_version(metric_name, fit["version"])
        assert "100%" in capsys.readouterr().err  # the tqdm bar reached its end

        for b in lw.list_batches(metric_name)[2:]:
            lw.delete_batch(metric_name, b["batch_id"])
        rest = frame[frame["batch"] >= 2]
        for _, part in rest.groupby("batch"):
            made = lw.post_stats(metric_name, stats_from_frame(part, FEATURES, "cause"))
            assert made["kind"] == "statistics"
        with pytest.raises(ProblemError) as err:  # the same statistics again
            lw.post_stats(metric_name, stats_from_frame(part, FEATURES, "cause"))
        assert err.value.status == 409
        fit = lw.wait_for_fit(lw.start_fit(metric_name, **params)["fit_id"], timeout=120,
                              progress_bar=False)
        assert fit["status"] == "succeeded", fit
        mixed = lw.get_version(metric_name, fit["version"])
    assert mixed["report"]["n_stats_only_batches"] == 4
    assert mixed["report"]["n_heldout_batches"] == 2

    def matrix(doc):
        L = np.asarray(doc["metric"]["components"])
        return L.T @ L

    assert_allclose(matrix(mixed), matrix(all_raw), rtol=1e-8, atol=1e-10)


def test_a_bad_statistics_document_is_a_field_error(live, metric_name, batches):
    doc = stats_from_frame(frame_of(batches[:1]), FEATURES, "cause")
    doc["scatter"][0][1] += 1.0
    with live.client() as lw:
        lw.put_metric(metric_name, FEATURES)
        with pytest.raises(ProblemError) as err:
            lw.post_stats(metric_name, doc)
    assert err.value.status == 422
    assert [f.field for f in err.value.errors] == ["scatter"]


@pytest.mark.parametrize("content_type", [ARROW, "application/json"])
def test_group_frame_joins_back_on_the_id_column(live, metric_name, batches, content_type):
    frame = frame_of(batches)
    with live.client() as lw:
        lw.put_metric(metric_name, FEATURES)
        for X, y in batches[:3]:
            lw.post_batch(metric_name, X, list(map(int, y)), columns=FEATURES)
        fit = lw.wait_for_fit(lw.start_fit(metric_name, method="discriminant",
                                           alphas=[0.1])["fit_id"], timeout=120)
        assert fit["status"] == "succeeded", fit
        sample = frame.sample(40, random_state=1)  # a shuffled index, extra columns
        out = lw.group_frame(metric_name, sample, "shipment_id", k=3,
                             content_type=content_type)
        plain = lw.group(metric_name, sample[FEATURES], k=3)
    assert list(out.index) == list(sample.index)
    assert list(out["shipment_id"]) == list(sample["shipment_id"])
    assert list(out["group"]) == plain["labels"]
    assert_allclose(out["distance"].to_numpy(), plain["distances"])
    joined = sample.join(out.drop(columns="shipment_id"))
    assert {"group", "distance", "margin", "cause"} <= set(joined.columns)
