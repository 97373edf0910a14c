"""Open-data batches for the service tests (test code only).

Iris (Fisher 1936) and wine (Forina et al.), as bundled with scikit-learn, split into
labelled batches by ``tests/datasets.py``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from service.context import Context
from service.tables import Table, from_json
from service.usecases import batches, metrics
from tests.datasets import load_open, make_batches


def open_batches(dataset: str, n: int, seed: int = 0) -> tuple[list[str], list[tuple]]:
    X, y = load_open(dataset)
    feats = [f"x{i}" for i in range(X.shape[1])]
    return feats, make_batches(X, y, n, np.random.default_rng(seed))


def as_table(feats: list[str], X: np.ndarray, groups: list[Any] | None = None) -> Table:
    """The columns-and-rows JSON form of ``X``, parsed as the API parses it."""
    return table_of({"columns": feats, "rows": X.tolist()}, groups)


def table_of(body: dict[str, Any], groups: list[Any] | None = None) -> Table:
    table = from_json(body)
    return table.with_groups(groups) if groups is not None else table


def setup_metric(ctx: Context, name: str = "m", dataset: str = "iris", n: int = 4,
                 seed: int = 0) -> tuple[list[str], list[tuple], list[str]]:
    """Create metric ``name`` with ``n`` open-data batches; returns features, batches, ids."""
    feats, data = open_batches(dataset, n, seed)
    metrics.put_metric(ctx, name, feats)
    ids = [batches.add_batch(ctx, name, as_table(feats, Xb, [int(v) for v in yb]))["batch_id"]
           for Xb, yb in data]
    return feats, data, ids
