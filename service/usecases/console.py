"""What the operators' console shows: one metric's versions and plots, and the fit
queue with its workers. Plain data plus SVG strings (:mod:`service.usecases.charts`,
which loads matplotlib only when a plot is drawn).
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

from service.core import FittedMetric

from . import charts, drift
from .fits import list_fits
from .metrics import require_metric
from .queues import queue_overview
from .versions import history

if TYPE_CHECKING:
    from service.context import Context

FAILED_SHOWN = 10  # the most recent failed fits on the board


def _parse(stamp: str | None) -> datetime | None:
    if not stamp:
        return None
    return datetime.fromisoformat(stamp.replace("Z", "+00:00"))


def age(stamp: str | None, now: datetime) -> str:
    """How long ago, for people: ``"42 s"``, ``"3 min"``, ``"2 h"``, ``"5 d"``."""
    then = _parse(stamp)
    if then is None:
        return "—"
    s = max(0, int((now - then).total_seconds()))
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60)):
        if s >= size:
            return f"{s // size} {unit}"
    return f"{s} s"


def overview(ctx: Context, may_touch: Callable[[str], bool]) -> dict[str, Any]:
    """The metrics the caller may touch (with their serving version), and the fit
    queue: waiting, running and recently failed fits with progress and age, and the
    workers with their last heartbeat."""
    now = datetime.now(timezone.utc)
    names = [n for n in ctx.storage.metrics.names() if may_touch(n)]
    metrics = [{"name": n, "active": ctx.storage.versions.active(n),
                "versions": len(ctx.storage.versions.numbers(n))} for n in sorted(names)]
    fits = [f for f in list_fits(ctx)["fits"] if may_touch(f["metric"])]

    def row(f: dict[str, Any], since: str | None) -> dict[str, Any]:
        return {**f, "age": age(since, now), "percent": round(100 * float(f["progress"] or 0))}

    board = {
        "waiting": [row(f, f["created_at"]) for f in fits if f["status"] == "waiting"],
        "running": [row(f, f["started_at"] or f["created_at"]) for f in fits
                    if f["status"] == "running"],
        "failed": [row(f, f["ended_at"]) for f in fits if f["status"] == "failed"
                   ][:FAILED_SHOWN],
    }
    queues = queue_overview(ctx, visible=may_touch)
    workers = [{**w, "beat_age": age(w["last_heartbeat"], now)} for w in queues["workers"]]
    return {"metrics": metrics, "fits": board, "queue": queues["queues"][0],
            "workers": workers, "at": now.strftime("%H:%M:%S UTC")}


def rollback_target(active: int | None, past: list[dict[str, Any]],
                    numbers: list[int]) -> int | None:
    """The version one button goes back to: the one that served before the active one
    (from the history), else the highest stored version below it."""
    if active is None:
        return None
    for entry in reversed(past):
        if entry["to"] == active and entry["from"] not in (None, active):
            return int(entry["from"])
        if entry["to"] == active:
            break
    lower = [n for n in numbers if n < active]
    return max(lower) if lower else None


def _shown_batch(ctx: Context, name: str, trained: set[str]) -> dict[str, Any] | None:
    """The newest batch the serving version did not train on, else the newest one."""
    ids = ctx.storage.batches.ids(name)
    unseen = [b for b in ids if b not in trained]
    for batch_id in reversed(unseen or ids):
        found = ctx.storage.batches.load_one(name, batch_id)
        if found is not None:
            return found
    return None


def metric_board(ctx: Context, name: str) -> dict[str, Any]:
    """One metric: its versions (held-out ARI against the Euclidean baseline), the
    serving version and its activation history, the version one button rolls back to,
    the serving version's feature weights and the newest batch in both spaces."""
    metric = require_metric(ctx, name)
    st = ctx.storage
    versions = st.versions.summaries(name)
    active = st.versions.active(name)
    past = history(ctx, name)["history"]
    numbers = [int(v["version"]) for v in versions]
    out: dict[str, Any] = {
        "name": name, "description": metric.get("description", ""),
        "features": metric["features"], "versions": versions[::-1], "active": active,
        "history": past[::-1], "rollback_to": rollback_target(active, past, numbers),
        "charts": {}, "batch": None, "drift": None,
    }
    if versions:
        out["charts"]["versions"] = charts.versions_chart(versions, active)
    if active is None:
        return out
    doc = st.versions.get(name, active, ("metric", "batches"))
    if doc is None:
        return out
    fitted = FittedMetric.from_dict(doc["metric"])
    columns = list(doc["metric"]["features"])
    out["charts"]["weights"] = charts.weights_chart(
        columns, charts.feature_weights(fitted.components))
    hist = drift.margin_histogram(ctx, name, active)
    if hist is not None and hist["records"] > 0:
        out["drift"] = {"records": hist["records"], "verdict": hist["verdict"],
                        "reference": hist["reference_kind"]}
        out["charts"]["margins"] = charts.margins_chart(hist)
    trained = {b["batch_id"] for b in doc["batches"]}
    newest = _shown_batch(ctx, name, trained)
    if newest is not None and newest["X"].shape[1] == fitted.n_features:
        batch_id = newest["meta"]["batch_id"]
        held_out = batch_id not in trained
        S = fitted.standardise(newest["X"])
        plane = charts.projections(S, S @ fitted.components.T, newest["labels"])
        out["batch"] = {"batch_id": batch_id, "records": int(newest["X"].shape[0]),
                        "held_out": held_out}
        out["charts"]["projection"] = charts.projection_chart(plane)
    return out
