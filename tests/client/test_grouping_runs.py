"""The client's grouping runs against the live service and its ``likewise worker``.

Data: all of iris as scikit-learn bundles it (Fisher 1936); the metric is fitted on
iris batches (tests/datasets.py). The reference is the service's own synchronous
grouping of the same DataFrame with the same k.
"""

from __future__ import annotations

import pandas as pd
import pyarrow as pa
import pytest

from likewise_client import ProblemError
from tests.api.helpers import IRIS_FEATURES, iris_batches
from tests.datasets import load_open


def test_start_wait_and_read_a_run_from_a_dataframe_and_an_arrow_table(live, metric_name):
    name = metric_name
    X, _ = load_open("iris")
    frame = pd.DataFrame(X, columns=IRIS_FEATURES)
    frame["parcel"] = [f"p{i:03d}" for i in range(len(frame))]
    with live.client() as lw:
        lw.put_metric(name, IRIS_FEATURES)
        for Xb, yb in iris_batches(4):
            lw.post_batch(name, Xb, yb, columns=IRIS_FEATURES)
        fit = lw.wait_for_fit(lw.start_fit(name)["fit_id"], timeout=120, interval=0.1)
        assert fit["status"] == "succeeded", fit

        run = lw.start_grouping_run(name, frame, 3, id_column="parcel")
        assert run["status"] in ("waiting", "grouping", "done") and run["n_records"] == 150
        seen: list[str] = []
        done = lw.wait_for_grouping_run(name, run["run_id"], timeout=120, interval=0.1,
                                        on_progress=lambda r: seen.append(r["status"]))
        assert done["status"] == "done" and seen[-1] == "done", done
        pages = list(lw.grouping_run_pages(name, run["run_id"], limit=64))
        assert [p["start"] for p in pages] == [0, 64, 128]
        sync = lw.group(name, frame[IRIS_FEATURES], 3)
        assert [v for p in pages for v in p["labels"]] == sync["labels"]
        assert [v for p in pages for v in p["ids"]] == frame["parcel"].tolist()
        assert done["outcome"]["sizes"] == sync["sizes"]

        table = lw.grouping_run_table(name, run["run_id"], limit=100)
        assert table.column("label").to_pylist() == sync["labels"]
        assert table.column("distance").to_pylist() == sync["distances"]

        # an Arrow table in, JSON on the wire: the same answer
        arrow = pa.Table.from_pandas(frame[IRIS_FEATURES], preserve_index=False)
        second = lw.start_grouping_run(name, arrow, 3, content_type="application/json")
        assert lw.wait_for_grouping_run(name, second["run_id"], timeout=120,
                                        interval=0.1)["status"] == "done"
        again = [v for p in lw.grouping_run_pages(name, second["run_id"]) for v in p["labels"]]
        assert again == sync["labels"]

        lw.delete_grouping_run(name, run["run_id"])
        with pytest.raises(ProblemError) as gone:
            lw.get_grouping_run(name, run["run_id"])
        assert gone.value.status == 404
        with pytest.raises(ProblemError) as bad:  # refused before anything is stored
            lw.start_grouping_run(name, frame[IRIS_FEATURES[:3]], 3)
        assert bad.value.status == 422
        lw.delete_metric(name)
