"""Running a fit (called by the RQ job) and reconciling fit records with RQ.

``execute_fit`` loads the batches and their statistics, runs the core's
``MetricSelector``, decides on activation and commits the version, its activation
and the fit's result in one transaction.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

from service.core import CoreError, MetricSelector
from service.errors import Conflict, NotFound
from service.storage import ActiveChanged, utcnow

from .batches import load_training_data

if TYPE_CHECKING:
    from service.context import Context

PUBLIC_FIELDS = ("fit_id", "metric", "status", "progress", "stage", "params", "version",
                 "error", "decision", "created_at", "started_at", "ended_at",
                 "requested_by", "attempts")
LIVE = ("queued", "running")
_COMMIT_ATTEMPTS = 10


def _result(record: dict[str, Any]) -> dict[str, Any]:
    return {k: record.get(k) for k in ("fit_id", "status", "version", "decision", "error")}


def _fail(ctx: Context, fit_id: str, message: str) -> dict[str, Any]:
    ctx.storage.update_fit(
        fit_id, {"status": "failed", "stage": "failed", "error": message, "ended_at": utcnow()},
        only_if=lambda r: r.get("status") in LIVE)
    return _result(ctx.storage.get_fit(fit_id) or {"fit_id": fit_id, "status": "failed"})


def _decide(
    name: str, mode: str, active: int | None, active_summary: dict[str, Any] | None,
    selector: MetricSelector, report: dict[str, Any], n: int,
) -> tuple[bool, str]:
    """Whether version ``n`` becomes active, and why (one sentence)."""
    ari = float(report["score"]["ari"])
    base = float(report["score"]["baseline_ari"])
    vs_base = (f"held-out ARI {ari:.4f} vs {base:.4f} for Euclidean k-means"
               + (" (beats the baseline)" if report.get("beats_baseline") else
                  " (does not beat the baseline)"))
    if mode == "always":
        return True, f"activate=always: version {n} activated; {vs_base}"
    if mode == "never":
        kept = f"version {active} stays active" if active else "no version is active"
        return False, f"activate=never: version {n} stored, {kept}; {vs_base}"
    if active is None or active_summary is None:
        return True, f"first version of metric {name!r}: activated; {vs_base}"
    try:
        old = selector.evaluate(active_summary["method"], float(active_summary["alpha"]))
    except CoreError as exc:
        return False, (f"active version {active} could not be re-scored ({exc.message}); "
                       f"version {n} stored without activating")
    old_ari = float(old["score"]["ari"])
    same = (f"held-out ARI {ari:.4f} vs {old_ari:.4f} for active version {active} "
            f"({active_summary['method']}, alpha={active_summary['alpha']:g}) re-scored "
            "on the same folds")
    if ari >= old_ari:
        return True, f"activate=if_better: {same}: version {n} activated"
    return False, f"activate=if_better: {same}: version {active} stays active"


def execute_fit(
    ctx: Context, fit_id: str, progress_cb: Callable[[str, float], None] | None = None
) -> dict[str, Any]:
    """Run fit ``fit_id`` to completion. Invalid data fails the fit (no RQ retry);
    unexpected errors propagate so RQ can retry."""
    st = ctx.storage
    record = st.get_fit(fit_id)
    if record is None:
        return {"fit_id": fit_id, "status": "gone"}
    if record["status"] == "succeeded":
        return _result(record)
    name, p = record["metric"], record["params"]

    def progress(stage: str, fraction: float) -> None:
        fraction = float(min(max(fraction, 0.0), 1.0))
        st.set_fit_progress(fit_id, stage, fraction)
        if progress_cb is not None:
            progress_cb(stage, fraction)

    metric = st.get_metric(name)
    if metric is None or metric["uid"] != record["metric_uid"]:
        return _fail(ctx, fit_id, f"metric {name!r} was deleted")
    started = st.update_fit(fit_id, {
        "status": "running", "stage": "loading", "progress": 0.0, "error": None,
        "started_at": record.get("started_at") or utcnow(),
        "attempts": int(record.get("attempts") or 0) + 1}, only_if=lambda r: r["status"] in LIVE)
    if not started:
        return _result(st.get_fit(fit_id) or record)
    progress("loading", 0.0)
    data = load_training_data(ctx, name)
    if len(data) < 2:
        return _fail(ctx, fit_id, f"metric {name!r} has {len(data)} batch(es) now; "
                                  "a fit needs at least 2")
    batches = [(d["X"], np.asarray(d["labels"])) for d in data]
    selector = MetricSelector(
        method=p["method"], alphas=p["alphas"], n_folds=p["n_folds"], max_rank=p["max_rank"],
        k_max=p["k_max"], random_state=p["seed"],
        progress=lambda stage, f: progress(stage, 0.05 + 0.85 * f))
    try:
        selector.fit(batches, [d["stats"] for d in data])
    except CoreError as exc:
        return _fail(ctx, fit_id, f"{exc.field or 'batches'}: {exc.message}")
    fitted, report = selector.metric_, selector.report_
    progress("deciding", 0.92)
    n = st.next_version_number(name)
    doc: dict[str, Any] = {
        "summary": {
            "version": n, "created_at": utcnow(), "method": fitted.method,
            "alpha": float(fitted.alpha), "rank": fitted.rank,
            "score": {k: float(v) for k, v in report["score"].items()},
            "beats_baseline": bool(report.get("beats_baseline")),
        },
        "report": report,
        "metric": {**fitted.to_dict(), "features": metric["features"]},
        "batches": [{"batch_id": d["meta"]["batch_id"], "sha256": d["meta"]["sha256"]}
                    for d in data],
    }
    for _ in range(_COMMIT_ATTEMPTS):
        active = st.active_version(name)
        active_doc = st.get_version(name, active, ("summary",)) if active else None
        activated, reason = _decide(name, p["activate"], active,
                                    active_doc["summary"] if active_doc else None,
                                    selector, report, n)
        now = utcnow()
        doc["parent"] = active
        fields = {"status": "succeeded", "stage": "done", "progress": 1.0, "version": n,
                  "error": None, "decision": {"activated": activated, "reason": reason},
                  "ended_at": now}
        entry = {"from": active, "to": n, "at": now, "who": record["requested_by"],
                 "reason": f"fit {fit_id}: {reason}", "fit_id": fit_id}
        try:
            st.commit_version(name, metric["uid"], n, doc, expected_active=active,
                              activate=activated, activation=entry, fit_id=fit_id,
                              fit_fields=fields)
            break
        except ActiveChanged:
            continue
        except NotFound:  # the metric was deleted (or re-created) while fitting
            return _fail(ctx, fit_id, f"metric {name!r} was deleted during the fit")
    else:
        raise Conflict("the active version kept changing; the fit will be retried")
    return _result(st.get_fit(fit_id) or fields)


def _job_error(job: Any) -> str:
    try:
        result = job.latest_result()
        text = (result.exc_string if result is not None else None) or ""
    except Exception:  # noqa: BLE001 — best effort description only
        text = ""
    lines = [ln for ln in text.strip().splitlines() if ln.strip()]
    return lines[-1].strip() if lines else "the fit job failed"


def reconcile(ctx: Context, record: dict[str, Any]) -> dict[str, Any]:
    """Bring a queued/running fit record in line with its RQ job and return it.

    A job whose worker died stays "started" in RQ until its heartbeat expires; then
    RQ's registry cleanup (run here) re-queues it if retries are left, or fails it.
    """
    if record.get("status") not in LIVE:
        return record
    from rq.exceptions import NoSuchJobError
    from rq.job import Job, JobStatus
    from rq.registry import StartedJobRegistry

    fit_id, job_id = record["fit_id"], record.get("job_id")

    def fetch() -> Any:
        try:
            return Job.fetch(job_id, connection=ctx.redis)
        except NoSuchJobError:
            return None

    job = fetch()
    # Job.fetch has just loaded the status: no second read of it
    if job is not None and job.get_status(refresh=False) == JobStatus.STARTED:
        StartedJobRegistry(queue=ctx.queue).cleanup()
        job = fetch()
    fields: dict[str, Any] | None = None
    status = job.get_status(refresh=False) if job is not None else None
    if job is None:
        fields = {"status": "failed", "stage": "failed", "ended_at": utcnow(),
                  "error": "the queue job of this fit no longer exists"}
    elif status == JobStatus.FAILED:
        fields = {"status": "failed", "stage": "failed", "ended_at": utcnow(),
                  "error": record.get("error") or _job_error(job)}
    elif status in (JobStatus.STOPPED, JobStatus.CANCELED):
        fields = {"status": "failed", "stage": "failed", "ended_at": utcnow(),
                  "error": f"the fit job was {status.value}"}
    elif status in (JobStatus.QUEUED, JobStatus.SCHEDULED) and record["status"] == "running":
        fields = {"status": "queued", "stage": "waiting for retry"}
    if fields is not None:
        ctx.storage.update_fit(
            fit_id, fields,
            only_if=lambda r: r.get("status") in LIVE and r.get("job_id") == job_id)
        return ctx.storage.get_fit(fit_id) or record
    return record
