"""Grouping new records with a stored version (the active one by default).

Loaded versions are cached in-process keyed by (metric, incarnation uid, version);
versions are immutable, and the active version number is read from Redis on every
call, so the cache follows activations without invalidation.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from service.core import CoreError, FittedMetric, RecordOverflowError, group_records
from service.errors import Conflict, InvalidInput, NotFound, from_core
from service.tables import to_matrix

from . import drift
from .metrics import require_metric
from .versions import check_version_number

if TYPE_CHECKING:
    from service.context import Context


def _check_k(k: Any, limit: int) -> int | None:
    if k is None or k == "auto":
        return None
    if isinstance(k, bool) or not isinstance(k, int) or k < 1:
        raise InvalidInput.field("k", 'a whole number ≥ 1 or "auto"')
    if k > limit:
        # exact and heuristic k-means both cost O(k·n) per pass: cap what one request asks
        raise InvalidInput.field("k", f"at most {limit} groups per request (LIKEWISE_MAX_GROUPS)")
    return k


def load_version_metric(
    ctx: Context, metric: dict[str, Any], n: int
) -> tuple[FittedMetric, list[str]]:
    """Version ``n``'s fitted map and the features it was fitted on, in its column order
    (the metric's features may have been reordered or renamed since, once its batches
    were deleted)."""
    key = (metric["name"], metric["uid"], n)
    loaded = ctx.cache.get(key)
    if loaded is None:
        doc = ctx.storage.versions.get(metric["name"], n, ("metric",))
        if doc is None:
            raise NotFound(f"metric {metric['name']!r} has no version {n}")
        features = list(doc["metric"].get("features") or metric["features"])
        loaded = (FittedMetric.from_dict(doc["metric"]), features)
        ctx.cache.put(key, loaded)
    return loaded


def group(
    ctx: Context,
    name: str,
    table: dict[str, Any],
    k: int | str | None = None,
    version: int | None = None,
) -> dict[str, Any]:
    metric = require_metric(ctx, name)
    k_value = _check_k(k, ctx.settings.max_groups)
    if version is None:
        version = ctx.storage.versions.active(name)
        if version is None:
            raise Conflict(f"metric {name!r} has no active version yet; run a fit first")
    else:
        check_version_number(version)
    fitted, features = load_version_metric(ctx, metric, version)
    s = ctx.settings
    X = to_matrix(features, table, s.max_batch_records, s.max_batch_bytes)
    try:
        g = group_records(fitted, X, k=k_value)
    except RecordOverflowError as exc:
        # finite numbers (each passed the table checks) can still overflow once rescaled
        field = f"{'records' if 'records' in table else 'rows'}[{exc.row}]"
        message = "values too large: their distances under this metric overflow float64"
        raise InvalidInput.field(field, message, f"{field}: {message}") from exc
    except CoreError as exc:
        raise from_core(exc, default_field="k") from exc
    drift.record(ctx, metric, version, fitted, X, g)
    return {
        "version": version,
        "k": int(g.k),
        "k_chosen": bool(g.k_chosen),
        "labels": [int(v) for v in g.labels],
        "distances": [float(v) for v in g.distances],
        # one group has no runner-up centre: its margin is undefined (null), not Infinity
        "margins": [float(v) if np.isfinite(v) else None for v in g.margins],
        "sizes": [int(v) for v in g.sizes],
    }
