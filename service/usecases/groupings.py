"""Grouping new records with a stored version (the active one by default).

Loaded versions are cached in-process keyed by (metric, incarnation uid, version);
versions are immutable, and the active version number is read from Redis on every
call (with the metric record, in one round trip), so the cache follows activations
without invalidation.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from service.core import CoreError, FittedMetric, RecordOverflowError, group_records
from service.errors import Conflict, InvalidInput, NotFound, from_core
from service.tables import Table

from . import drift
from .metrics import check_name
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


def _metric_and_active(ctx: Context, name: str) -> tuple[dict[str, Any], int | None]:
    """The metric record (404 if none) and its active version: one Redis round trip."""
    check_name(name)
    metric, active = ctx.storage.metrics.get_with_active(name)
    if metric is None:
        raise NotFound(f"metric {name!r} does not exist")
    return metric, active


def load_version_metric(ctx: Context, metric: dict[str, Any], n: int) -> tuple[
        FittedMetric, list[str], dict[str, Any]]:
    """Version ``n``'s fitted map, the features it was fitted on (in its column order:
    the metric's may have been reordered or renamed since, once its batches were
    deleted) and how it read its tables (categories, missing values)."""
    key = (metric["name"], metric["uid"], n)
    loaded = ctx.cache.get(key)
    if loaded is None:
        doc = ctx.storage.versions.get(metric["name"], n, ("metric",))
        if doc is None:
            raise NotFound(f"metric {metric['name']!r} has no version {n}")
        stored = doc["metric"]
        inputs = stored.get("inputs") or {
            "features": list(stored.get("features") or metric["features"]),
            "categories": {}, "missing_values": "refuse"}
        loaded = (FittedMetric.from_dict(stored), inputs["features"], inputs)
        ctx.cache.put(key, loaded)
    return loaded


def group(
    ctx: Context,
    name: str,
    table: Table,
    k: int | str | None = None,
    version: int | None = None,
    *,
    ignore_extra: bool | None = None,
    id_column: str | None = None,
) -> dict[str, Any]:
    """Group the table's records; ``id_column`` is echoed back as ``ids`` (and may be
    a column the metric does not use)."""
    metric, active = _metric_and_active(ctx, name)
    k_value = _check_k(k, ctx.settings.max_groups)
    if version is None:
        version = active
        if version is None:
            raise Conflict(f"metric {name!r} has no active version yet; run a fit first")
    else:
        check_version_number(version)
    fitted, features, inputs = load_version_metric(ctx, metric, version)
    if ignore_extra is None:
        ignore_extra = metric["inputs"]["ignore_extra_columns"]
    ids = table.column_values(id_column) if id_column is not None else None
    m = table.matrix(features, ignore_extra=ignore_extra,
                     allowed=(id_column,) if id_column else (),
                     fill=fitted.mean if inputs.get("missing_values") == "impute_mean" else None,
                     categories=inputs.get("categories"))
    try:
        g = group_records(fitted, m.X, k=k_value)
    except RecordOverflowError as exc:
        # finite numbers (each passed the table checks) can still overflow once rescaled
        field = table.row_field(exc.row)
        message = "values too large: their distances under this metric overflow float64"
        raise InvalidInput.field(field, message, f"{field}: {message}") from exc
    except CoreError as exc:
        raise from_core(exc, default_field="k") from exc
    drift.record(ctx, metric, version, fitted, m.X, g, imputed=m.imputed)
    margins = g.margins.astype(float)
    answer = {
        "version": version,
        "k": int(g.k),
        "k_chosen": bool(g.k_chosen),
        "labels": g.labels.astype(int).tolist(),
        "distances": g.distances.astype(float).tolist(),
        # one group has no runner-up centre: its margin is undefined (null), not Infinity
        "margins": margins.tolist() if np.isfinite(margins).all()
        else [v if np.isfinite(v) else None for v in margins.tolist()],
        "sizes": g.sizes.astype(int).tolist(),
        "imputed": m.imputed,
    }
    if m.imputed:
        answer["imputed_by_feature"] = m.imputed_by_feature
    if ids is not None:
        answer["ids"] = ids
    return answer
