"""Versions: immutable fitted metrics; activation (roll back or forward) and its history."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from service.clock import utcnow
from service.core import FittedMetric
from service.errors import Conflict, InvalidInput, NotFound
from service.store import MissingVersion

from .metrics import require_metric

if TYPE_CHECKING:
    from service.context import Context

MAX_REASON = 1000


def check_version_number(n: Any, field: str = "version") -> int:
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise InvalidInput.field(field, "a version number (whole number ≥ 1)")
    return n


def chosen_version(ctx: Context, name: str, version: Any) -> int:
    """``version`` checked, or else the active version (409 when none is)."""
    if version is not None:
        return check_version_number(version)
    active = ctx.storage.versions.active(name)
    if active is None:
        raise Conflict(f"metric {name!r} has no active version yet; run a fit first")
    return active


def list_versions(ctx: Context, name: str) -> dict[str, Any]:
    require_metric(ctx, name)
    active = ctx.storage.versions.active(name)
    return {"versions": [{**s, "active": s["version"] == active}
                         for s in ctx.storage.versions.summaries(name)]}


def get_version(ctx: Context, name: str, n: int) -> dict[str, Any]:
    """Summary plus report, training batches (ids and content hashes), fit id, parent
    and the fitted metric (features, scales, mean, components, matrix …)."""
    require_metric(ctx, name)
    check_version_number(n)
    doc = ctx.storage.versions.get(name, n)
    if doc is None:
        raise NotFound(f"metric {name!r} has no version {n}")
    active = ctx.storage.versions.active(name)
    # M = LᵀL is derived from the stored map, not stored itself (d² numbers per version)
    matrix = FittedMetric.from_dict(doc["metric"]).matrix.tolist()
    return {**doc["summary"], "active": n == active, "report": doc["report"],
            "batches": doc["batches"], "fit_id": doc["fit_id"], "parent": doc["parent"],
            "metric": {**doc["metric"], "matrix": matrix}}


def activate(ctx: Context, name: str, version: int, reason: str, who: str) -> dict[str, Any]:
    """Make any stored version the active one; recorded in the history."""
    require_metric(ctx, name)
    check_version_number(version)
    if reason is None:
        reason = ""
    if not isinstance(reason, str) or len(reason) > MAX_REASON:
        raise InvalidInput.field("reason", f"a string of at most {MAX_REASON} characters")
    entry = {"at": utcnow(), "who": who, "reason": reason, "fit_id": None}
    try:
        previous = ctx.storage.versions.activate(name, version, entry)
    except MissingVersion as exc:
        raise NotFound(str(exc)) from exc
    return {"name": name, "active_version": version, "previous_version": previous}


def history(ctx: Context, name: str) -> dict[str, Any]:
    require_metric(ctx, name)
    keys = ("from", "to", "at", "who", "reason", "fit_id")
    return {"history": [{k: e.get(k) for k in keys} for e in ctx.storage.versions.history(name)]}
