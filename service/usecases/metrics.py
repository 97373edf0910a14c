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

import re
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

FEATURE_RE = re.compile(r"[^\x00-\x1f]{1,128}")
MAX_DESCRIPTION = 2000
MISSING_POLICIES = ("refuse", "impute_mean")


def require_metric(ctx: Context, name: str) -> dict[str, Any]:
    """The stored metric record (with ``uid``) or 404; a name from the URL path is read
    here (a :class:`MetricName` already was)."""
    name = metric_name(name)
    metric = ctx.storage.metrics.get(name)
    if metric is None:
        raise NotFound(f"metric {name!r} does not exist")
    return metric


def _check_features(ctx: Context, features: Any) -> list[str]:
    if not isinstance(features, list) or not features:
        raise InvalidInput.field("features", "must be a non-empty list of names")
    limit = ctx.settings.max_batch_features
    if len(features) > limit:
        raise InvalidInput.field("features", f"at most {limit} features")
    for i, f in enumerate(features):
        if not isinstance(f, str) or not FEATURE_RE.fullmatch(f) or f != f.strip():
            raise InvalidInput.field(
                f"features[{i}]", "names are 1-128 printable characters, no surrounding spaces")
    if len(set(features)) != len(features):
        raise InvalidInput.field("features", "names must be unique")
    return list(features)


def _check_inputs(ctx: Context, features: list[str], categories: Any, missing: Any,
                  ignore_extra: Any) -> dict[str, Any]:
    categories = categories or {}
    if not isinstance(categories, dict):
        raise InvalidInput.field("categories", "an object of feature: [level, ...]")
    for name, levels in categories.items():
        where = f"categories.{name}"
        if name not in features:
            raise InvalidInput.field(where, "not one of the metric's features")
        if (not isinstance(levels, list) or not levels
                or not all(isinstance(v, str) and v for v in levels)):
            raise InvalidInput.field(where, "a non-empty list of level names")
        if len(set(levels)) != len(levels):
            raise InvalidInput.field(where, "level names must be unique")
    encoded = encoded_names(features, categories)
    if len(set(encoded)) != len(encoded):
        raise InvalidInput.field(
            "categories", f"a level column ('feature{LEVEL_SEPARATOR}level') has the name "
                          "of another feature")
    width = len(encoded)
    if width > ctx.settings.max_batch_features:
        raise InvalidInput.field(
            "categories", f"the features with their levels make {width} columns "
                          f"(at most {ctx.settings.max_batch_features})")
    missing = missing or "refuse"
    if missing not in MISSING_POLICIES:
        raise InvalidInput.field("missing_values", "one of " + ", ".join(MISSING_POLICIES))
    if not isinstance(ignore_extra or False, bool):
        raise InvalidInput.field("ignore_extra_columns", "true or false")
    return {"categories": {f: list(categories[f]) for f in features if f in categories},
            "missing_values": missing, "ignore_extra_columns": bool(ignore_extra)}


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
    """Create a metric or update it; True when created.

    409 if the features or categories change while the metric has batches.
    """
    name = metric_name(name)
    features = _check_features(ctx, features)
    inputs = _check_inputs(ctx, features, categories, missing_values, ignore_extra_columns)
    if description is None:
        description = ""
    if not isinstance(description, str) or len(description) > MAX_DESCRIPTION:
        raise InvalidInput.field("description", f"a string of at most {MAX_DESCRIPTION} characters")
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
