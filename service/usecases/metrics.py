"""Metrics: a name, an ordered list of features, and how their tables are read.

``inputs`` says how a posted table becomes the metric's matrix:

- ``categories``: ``{feature: [level, ...]}`` — a categorical feature, one-hot encoded
  inside (one column per level, reported by level in a version's explanation);
- ``missing_values``: ``refuse`` (the default) or ``impute_mean`` (a batch's gaps
  are filled with its own feature means, a grouping's with the version's training
  means; both are counted);
- ``ignore_extra_columns``: drop columns that are not features instead of refusing
  them (a request may say so itself).
"""

from __future__ import annotations

import secrets
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from service.errors import Conflict, InvalidInput, NotFound
from service.store import FeaturesLocked
from service.tables import LEVEL_SEPARATOR, encoded_names

from . import pages
from .params import metric_name

if TYPE_CHECKING:
    from service.context import Context



def require_metric(ctx: Context, name: str) -> dict[str, Any]:
    """The stored metric record (with ``uid``) or 404; a name from the URL path is read
    here (a :class:`MetricName` already was)."""
    name = metric_name(name)
    metric = ctx.storage.metrics.get(name)
    if metric is None:
        raise NotFound(f"metric {name!r} does not exist")
    return metric


def _within_limits(ctx: Context, features: list[str],
                   categories: dict[str, list[str]]) -> dict[str, list[str]]:
    """The deployment's cap on columns, and the categories against the features (each
    value's own rule ran where it was read: ``service.usecases.params``)."""
    limit = ctx.settings.max_batch_features
    if len(features) > limit:
        raise InvalidInput.field("features", f"at most {limit} features")
    for name in categories:
        if name not in features:
            raise InvalidInput.field(f"categories.{name}", "not one of the metric's features")
    encoded = encoded_names(features, categories)
    if len(set(encoded)) != len(encoded):
        raise InvalidInput.field(
            "categories", f"a level column ('feature{LEVEL_SEPARATOR}level') has the name "
                          "of another feature")
    width = len(encoded)
    if width > limit:
        raise InvalidInput.field(
            "categories", f"the features with their levels make {width} columns "
                          f"(at most {limit})")
    return {f: list(categories[f]) for f in features if f in categories}


def _public(ctx: Context, metric: dict[str, Any], counts: dict[str, Any] | None = None
            ) -> dict[str, Any]:
    counts = counts or ctx.storage.metrics.counts(metric["name"])
    return {
        "name": metric["name"],
        "features": metric["features"],
        **metric["inputs"],
        "description": metric["description"],
        "created_at": metric["created_at"],
        "updated_at": metric["updated_at"],
        "active_version": counts["active_version"],
        "batches": counts["batches"],
        "records": counts["records"],
        "versions": counts["versions"],
    }


def put_metric(
    ctx: Context, name: str, features: list[str], description: str = "", *,
    categories: dict[str, list[str]] | None = None, missing_values: str = "refuse",
    ignore_extra_columns: bool = False,
) -> tuple[dict[str, Any], bool]:
    """Create a metric or update it; True when created. The values are those the rules
    of ``service.usecases.params`` read (``feature_names``, ``description``,
    ``level_map``, ``missing_policy``); the name is read here.

    409 if the features or categories change while the metric has batches.
    """
    name = metric_name(name)
    inputs = {"categories": _within_limits(ctx, features, categories or {}),
              "missing_values": missing_values, "ignore_extra_columns": ignore_extra_columns}
    try:
        record, outcome = ctx.storage.metrics.put(name, features, description,
                                                  secrets.token_hex(8), inputs)
    except FeaturesLocked as exc:
        raise Conflict(str(exc), [{"field": "features",
                                   "message": "cannot change while batches exist"}]) from exc
    return _public(ctx, record), outcome == "created"


def list_metrics(ctx: Context, limit: int = pages.DEFAULT_LIMIT, cursor: str | None = None,
                 visible: Callable[[str], bool] | None = None) -> dict[str, Any]:
    """A page of metrics by name (those ``visible`` says the caller may see)."""
    after = pages.decode(cursor, "metrics", lambda v: isinstance(v, str))
    names = [n for n in ctx.storage.metrics.names()
             if (after is None or n > after) and (visible is None or visible(n))]
    found = [m for m in ctx.storage.metrics.get_many(names[:limit + 1]) if m is not None]
    counts = ctx.storage.metrics.counts_many([m["name"] for m in found])
    listed = [_public(ctx, m, c) for m, c in zip(found, counts, strict=True)]
    return pages.page("metrics", listed, limit, "metrics", lambda m: m["name"])


def get_metric(ctx: Context, name: str) -> dict[str, Any]:
    return _public(ctx, require_metric(ctx, name))


def delete_metric(ctx: Context, name: str) -> None:
    name = metric_name(name)
    if not ctx.storage.metrics.delete(name):
        raise NotFound(f"metric {name!r} does not exist")
