"""Versions: immutable fitted metrics; activation (roll back or forward) and its history."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from service.clock import utcnow
from service.core import FittedMetric
from service.errors import Conflict, NotFound
from service.store import MissingVersion

from . import pages
from .metrics import require_metric
from .params import MAX_REASON, Reason, VersionNumber

if TYPE_CHECKING:
    from service.context import Context

__all__ = ["MAX_REASON", "activate", "chosen_version", "explain_version", "get_version",
           "history", "list_versions"]


def chosen_version(ctx: Context, name: str, version: int | None) -> int:
    """``version``, or else the active version (409 when none is)."""
    if version is not None:
        return version
    active = ctx.storage.versions.active(name)
    if active is None:
        raise Conflict(f"metric {name!r} has no active version yet; run a fit first")
    return active


def list_versions(ctx: Context, name: str, limit: int = pages.DEFAULT_LIMIT,
                  cursor: str | None = None) -> dict[str, Any]:
    """A page of version summaries by number."""
    require_metric(ctx, name)
    after = pages.decode(cursor, f"versions:{name}", pages.whole)
    active = ctx.storage.versions.active(name)
    listed = [{**s, "active": s["version"] == active}
              for s in ctx.storage.versions.summaries(name, after, limit + 1)]
    return pages.page("versions", listed, limit, f"versions:{name}", lambda v: v["version"])


def get_version(ctx: Context, name: str, n: VersionNumber) -> dict[str, Any]:
    """Summary plus report, training batches (ids and content hashes), fit id, parent
    and the fitted metric (features, scales, mean, components, matrix …)."""
    require_metric(ctx, name)
    doc = ctx.storage.versions.get(name, n)
    if doc is None:
        raise NotFound(f"metric {name!r} has no version {n}")
    active = ctx.storage.versions.active(name)
    # M = LᵀL is derived from the stored map, not stored itself (d² numbers per version)
    matrix = FittedMetric.from_dict(doc["metric"]).matrix.tolist()
    return {**doc["summary"], "active": n == active, "report": doc["report"],
            "batches": doc["batches"], "fit_id": doc["fit_id"], "parent": doc["parent"],
            "metric": {**doc["metric"], "matrix": matrix}}


TOP_DIRECTIONS = 10  # the strongest eigen-directions an explanation lists


def _fold_scores(report: dict[str, Any]) -> list[dict[str, Any]]:
    """Held-out ARI per fold for the winner and for Euclidean k-means, from the
    selector's fold reports (each lists every candidate's score; Euclidean is always
    a candidate)."""
    won = (report.get("method"), report.get("alpha"))
    out = []
    for fold in report.get("folds") or []:
        by = {(c["method"], c["alpha"]): c["ari"] for c in fold.get("scores", [])}
        out.append({"fold": fold.get("fold"), "repeat": fold.get("repeat"),
                    "scored_batches": fold.get("scored_batches"),
                    "held_out": fold.get("held_out"),
                    "ari": by.get(won), "baseline_ari": by.get(("euclidean", 0.0))})
    return out


def explain_version(ctx: Context, name: str, n: VersionNumber) -> dict[str, Any]:
    """A version read by feature name: per-feature weight in original units and share
    of the metric, the strongest directions with their loadings, and held-out ARI per
    fold for the version's configuration and for Euclidean (docs/method.md)."""
    require_metric(ctx, name)
    doc = ctx.storage.versions.get(name, n, ("summary", "report", "metric"))
    if doc is None:
        raise NotFound(f"metric {name!r} has no version {n}")
    stored = doc["metric"]
    fitted = FittedMetric.from_dict(stored)
    names = list(stored["features"])
    weight, share = fitted.unit_weights()
    strength, loadings = fitted.directions(TOP_DIRECTIONS)
    trace = float(np.trace(fitted.matrix))
    report = doc["report"]
    return {
        "name": name, "version": n, "method": fitted.method, "alpha": fitted.alpha,
        "rank": fitted.rank,
        "features": {f: {"weight": float(w), "share": float(sh), "scale": float(sc),
                         "mean": float(mu)}
                     for f, w, sh, sc, mu in zip(names, weight, share, fitted.scales,
                                                 fitted.mean, strict=True)},
        "directions": [{"strength": float(v), "share": float(v) / trace if trace > 0 else 0.0,
                        "loadings": dict(zip(names, map(float, row), strict=True))}
                       for v, row in zip(strength, loadings, strict=True)],
        "score": report.get("score"), "beats_baseline": report.get("beats_baseline"),
        "folds": _fold_scores(report),
    }


def activate(ctx: Context, name: str, version: VersionNumber, reason: Reason,
             who: str) -> dict[str, Any]:
    """Make any stored version the active one; recorded in the history."""
    require_metric(ctx, name)
    entry = {"at": utcnow(), "who": who, "reason": reason, "fit_id": None}
    try:
        previous = ctx.storage.versions.activate(name, version, entry)
    except MissingVersion as exc:
        raise NotFound(str(exc)) from exc
    return {"name": name, "active_version": version, "previous_version": previous}


def history(ctx: Context, name: str, limit: int = pages.DEFAULT_LIMIT,
            cursor: str | None = None) -> dict[str, Any]:
    """A page of activations, oldest first (the history only grows)."""
    require_metric(ctx, name)
    start = pages.decode(cursor, f"history:{name}", pages.whole) or 0
    keys = ("from", "to", "at", "who", "reason", "fit_id")
    rows = [(start + i, {k: e.get(k) for k in keys})
            for i, e in enumerate(ctx.storage.versions.history(name, start, limit + 1))]
    page = pages.page("history", rows, limit, f"history:{name}", lambda r: r[0] + 1)
    return {"history": [e for _, e in page["history"]], "next_cursor": page["next_cursor"]}
