"""Running a fit (called by the queue job).

``execute_fit`` loads the batches and their statistics, runs the core's
``MetricSelector``, decides on activation and commits the version, its activation
and the fit's result in one transaction. Every change of the fit record is a move of
:class:`~service.lifecycle.Fit`, fenced on the attempt's job id: an attempt that the
warden has already given up on changes nothing.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

from service.clock import utcnow
from service.core import CoreError, MetricSelector
from service.errors import Conflict
from service.lifecycle import Fit, FitStatus
from service.store import ActiveChanged, MissingMetric, StaleAttempt
from service.tables import encoded_names

from .batches import load_training_data
from .drift import reference_blob

if TYPE_CHECKING:
    from service.context import Context

    from .ports import LeaseStore

_COMMIT_ATTEMPTS = 10


def _result(fit: Fit | None, fit_id: str) -> dict[str, Any]:
    if fit is None:
        return {"fit_id": fit_id, "status": "gone", "version": None, "decision": None,
                "error": None}
    return {"fit_id": fit.fit_id, "status": fit.status.value, "version": fit.version,
            "decision": fit.decision, "error": fit.error}


def _ours(job_id: str | None) -> Callable[[Fit], bool]:
    """Whether a stored fit is still run by this attempt."""
    return lambda f: f.live and (job_id is None or f.job_id == job_id)


def fail_attempt(ctx: Context, fit_id: str, job_id: str | None, message: str) -> Fit | None:
    """Fail the fit if this attempt still owns it; returns the stored fit."""
    ours = _ours(job_id)
    failed = ctx.storage.fits.change(fit_id, lambda f: f.fail(message) if ours(f) else None)
    return failed or ctx.storage.fits.get(fit_id)


class Lease:
    """The attempt's lease on its fit, renewed by a thread while the fit runs.

    Taken before the fit becomes running, so a running fit without a lease is an
    attempt that died (its process was killed, its machine lost): the warden hands
    the fit to a new job once the lease lapses (``Settings.lease_seconds``).
    """

    def __init__(self, ctx: Context, fit_id: str, job_id: str,
                 store: LeaseStore | None = None) -> None:
        # ``store``: another store with the same lease methods (a grouping run's)
        self.fits: LeaseStore = store or ctx.storage.fits
        self.fit_id, self.job_id = fit_id, job_id
        self.ttl_ms = ctx.settings.lease_seconds * 1000
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._renew, name="likewise-lease",
                                        daemon=True)

    def __enter__(self) -> Lease:
        self.fits.take_lease(self.fit_id, self.job_id, self.ttl_ms)
        self._thread.start()
        return self

    def _renew(self) -> None:
        while not self._stop.wait(self.ttl_ms / 4000):
            try:
                if not self.fits.renew_lease(self.fit_id, self.job_id, self.ttl_ms):
                    return  # lapsed or handed over: the commit is fenced anyway
            except Exception:  # noqa: BLE001 — a missed renewal is retried next tick
                continue

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(timeout=5)
        try:
            self.fits.release_lease(self.fit_id, self.job_id)
        except Exception:  # noqa: BLE001 — it expires by itself
            pass


def _begin(fit: Fit) -> Fit:
    """The attempt starts; a record still running under this job id is a previous
    attempt of the same job that died unnoticed."""
    if fit.status is FitStatus.RUNNING:
        fit = fit.wait_for_retry("the previous attempt stopped without a result")
    return fit.start()


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
    if mode == "at_once":
        return True, f"activate=at_once: version {n} activated; {vs_base}"
    if mode == "by_hand":
        kept = f"version {active} stays active" if active else "no version is active"
        return False, f"activate=by_hand: version {n} stored, {kept}; {vs_base}"
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
        return True, f"activate=when_better: {same}: version {n} activated"
    return False, f"activate=when_better: {same}: version {active} stays active"


def execute_fit(ctx: Context, fit_id: str, job_id: str | None = None) -> dict[str, Any]:
    """Run fit ``fit_id`` to completion as attempt ``job_id`` (None: whichever job the
    record names). Invalid data fails the fit (no retry); unexpected errors propagate
    so the queue can retry the job."""
    fit = ctx.storage.fits.get(fit_id)
    if fit is None or not fit.live:
        return _result(fit, fit_id)
    job_id = job_id or fit.job_id
    if fit.job_id != job_id:  # a job the fit has moved on from: nothing to do
        return _result(fit, fit_id)
    with Lease(ctx, fit_id, job_id):
        return _attempt(ctx, fit, job_id)


def _attempt(ctx: Context, fit: Fit, job_id: str) -> dict[str, Any]:
    st, fit_id = ctx.storage, fit.fit_id
    ours = _ours(job_id)
    name, p = fit.metric, fit.params

    def progress(stage: str, fraction: float) -> None:
        fraction = float(min(max(fraction, 0.0), 1.0))
        st.fits.set_progress(fit_id, stage, fraction)

    metric = st.metrics.get(name)
    if metric is None or metric["uid"] != fit.metric_uid:
        return _result(fail_attempt(ctx, fit_id, job_id, f"metric {name!r} was deleted"),
                       fit_id)
    started = st.fits.change(fit_id, lambda f: _begin(f) if ours(f) else None)
    if started is None:
        return _result(st.fits.get(fit_id), fit_id)
    progress("loading", 0.0)
    data = load_training_data(ctx, name)
    raw = [d for d in data if d["X"] is not None]
    if len(raw) < 2:
        only = len(data) - len(raw)
        return _result(fail_attempt(
            ctx, fit_id, job_id,
            f"metric {name!r} has {len(raw)} batch(es) with records now"
            + (f" (and {only} statistics-only)" if only else "")
            + "; a fit needs at least 2 with records (held-out scoring groups records)"),
            fit_id)
    batches = [(d["X"], np.asarray(d["labels"])) for d in raw]
    selector = MetricSelector(
        method=p["method"], alphas=p["alphas"], n_folds=p["n_folds"], max_rank=p["max_rank"],
        k_max=p["k_max"], random_state=p["seed"],
        progress=lambda stage, f: progress(stage, 0.05 + 0.85 * f))
    try:
        selector.fit(batches, [d["stats"] for d in raw],
                     stats_only=[d["stats"] for d in data if d["X"] is None])
    except CoreError as exc:
        return _result(fail_attempt(ctx, fit_id, job_id,
                                    f"{exc.field or 'batches'}: {exc.message}"), fit_id)
    fitted, report = selector.metric_, selector.report_
    progress("deciding", 0.92)
    # committed with the version
    reference = reference_blob(fitted, batches, selector.heldout_groupings_.values())
    n = st.versions.next_number(name)
    doc: dict[str, Any] = {
        "summary": {
            "version": n, "created_at": utcnow(), "method": fitted.method,
            "alpha": float(fitted.alpha), "rank": fitted.rank,
            "score": {k: float(v) for k, v in report["score"].items()},
            "beats_baseline": bool(report.get("beats_baseline")),
        },
        "report": report,
        "metric": {
            **fitted.to_dict(),
            # the matrix's columns (a categorical feature gives one per level)
            "features": encoded_names(metric["features"], metric["inputs"]["categories"]),
            "inputs": {"features": metric["features"],
                       "categories": metric["inputs"]["categories"],
                       "missing_values": metric["inputs"]["missing_values"],
                       "imputed_in_training": sum(int(d["meta"].get("imputed", 0))
                                                  for d in data)},
        },
        "batches": [{"batch_id": d["meta"]["batch_id"], "sha256": d["meta"]["sha256"]}
                    for d in data],
    }
    for _ in range(_COMMIT_ATTEMPTS):
        active = st.versions.active(name)
        active_doc = st.versions.get(name, active, ("summary",)) if active else None
        activated, reason = _decide(name, p["activate"], active,
                                    active_doc["summary"] if active_doc else None,
                                    selector, report, n)
        doc["parent"] = active
        done = started.succeed(n, {"activated": activated, "reason": reason})
        entry = {"from": active, "to": n, "at": done.ended_at, "who": fit.requested_by,
                 "reason": f"fit {fit_id}: {reason}", "fit_id": fit_id}
        try:
            st.versions.commit(name, metric["uid"], n, doc, expected_active=active,
                               activate=activated, activation=entry, fit=done,
                               reference=reference)
            break
        except ActiveChanged:
            continue
        except StaleAttempt:  # the warden gave this attempt up; another one owns the fit
            return _result(st.fits.get(fit_id), fit_id)
        except MissingMetric:  # the metric was deleted (or re-created) while fitting
            return _result(fail_attempt(ctx, fit_id, job_id,
                                        f"metric {name!r} was deleted during the fit"), fit_id)
    else:
        raise Conflict("the active version kept changing; the fit will be retried")
    return _result(st.fits.get(fit_id) or done, fit_id)
