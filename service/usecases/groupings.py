"""Grouping new records with a stored version (the active one by default).

Loaded versions are cached in-process keyed by (metric, incarnation uid, version);
versions are immutable, and the active version number is read from Redis on every
call, so the cache follows activations without invalidation.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from service.core import CoreError, FittedMetric, RecordOverflowError, group_records
from service.errors import Conflict, InvalidInput, NotFound, from_core
from service.tables import Matrix, Table

from . import drift
from .params import GroupCount, VersionNumber, metric_name

if TYPE_CHECKING:
    from service.context import Context


def _within_limit(k: GroupCount | None, limit: int) -> None:
    """The deployment's cap on ``k`` (a setting, so not part of ``k``'s own rule)."""
    if k is not None and k > limit:
        # exact and heuristic k-means both cost O(k·n) per pass: cap what one request asks
        raise InvalidInput.field("k", f"at most {limit} groups per request (LIKEWISE_MAX_GROUPS)")


def _metric_and_active(ctx: Context, name: str) -> tuple[dict[str, Any], int | None]:
    """The metric record (404 if none) and its active version: one Redis round trip."""
    name = metric_name(name)
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


@dataclass(frozen=True)
class Prepared:
    """A grouping request checked against its version: what grouping needs."""

    metric: dict[str, Any]
    k: GroupCount | None
    version: int
    fitted: FittedMetric
    matrix: Matrix
    ids: list[Any] | None


def prepare(ctx: Context, name: str, table: Table, k: GroupCount | None = None,
            version: VersionNumber | None = None, *, ignore_extra: bool | None = None,
            id_column: str | None = None) -> Prepared:
    """Check a grouping's options and table against the version it names (the active
    one by default) and read the matrix in that version's columns. ``k`` None: the
    service chooses it."""
    metric, active = _metric_and_active(ctx, name)
    _within_limit(k, ctx.settings.max_groups)
    n = version if version is not None else active
    if n is None:
        raise Conflict(f"metric {name!r} has no active version yet; run a fit first")
    fitted, features, inputs = load_version_metric(ctx, metric, n)
    if ignore_extra is None:
        ignore_extra = metric["inputs"]["ignore_extra_columns"]
    ids = table.column_values(id_column) if id_column is not None else None
    m = table.matrix(features, ignore_extra=ignore_extra,
                     allowed=(id_column,) if id_column else (),
                     fill=fitted.mean if inputs.get("missing_values") == "impute_mean" else None,
                     categories=inputs.get("categories"))
    return Prepared(metric, k, n, fitted, m, ids)


def overflow_error(table: Table, row: int) -> InvalidInput:
    """Finite numbers (each passed the table checks) can still overflow once rescaled."""
    field = table.row_field(row)
    message = "values too large: their distances under this metric overflow float64"
    return InvalidInput.field(field, message, f"{field}: {message}")


def json_margins(margins: np.ndarray) -> list[float | None]:
    """One group has no runner-up centre: its margin is undefined (null), not Infinity."""
    margins = np.asarray(margins, dtype=float)
    return margins.tolist() if np.isfinite(margins).all() \
        else [v if np.isfinite(v) else None for v in margins.tolist()]


def group(
    ctx: Context,
    name: str,
    table: Table,
    k: GroupCount | None = None,
    version: VersionNumber | None = None,
    *,
    ignore_extra: bool | None = None,
    id_column: str | None = None,
) -> dict[str, Any]:
    """Group the table's records; ``id_column`` is echoed back as ``ids`` (and may be
    a column the metric does not use). ``k`` None: the service chooses it; ``version``
    None: the active one."""
    p = prepare(ctx, name, table, k, version, ignore_extra=ignore_extra, id_column=id_column)
    m = p.matrix
    try:
        g = group_records(p.fitted, m.X, k=p.k)
    except RecordOverflowError as exc:
        raise overflow_error(table, exc.row) from exc
    except CoreError as exc:
        raise from_core(exc, default_field="k") from exc
    drift.record(ctx, p.metric, p.version, p.fitted, m.X, g, imputed=m.imputed)
    answer = {
        "version": p.version,
        "k": int(g.k),
        "k_chosen": bool(g.k_chosen),
        "labels": g.labels.astype(int).tolist(),
        "distances": g.distances.astype(float).tolist(),
        "margins": json_margins(g.margins),
        "sizes": g.sizes.astype(int).tolist(),
        "imputed": m.imputed,
    }
    if m.imputed:
        answer["imputed_by_feature"] = m.imputed_by_feature
    if p.ids is not None:
        answer["ids"] = p.ids
    return answer
