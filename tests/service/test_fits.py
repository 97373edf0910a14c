"""Fits with real RQ workers on a real Redis: success, activation decisions, dedupe,
retries, timeouts and workers that die.

Data: wine (Forina et al.) and iris (Fisher 1936) as bundled with scikit-learn.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from rq.job import Job

from service.context import Context
from service.core import MetricSelector
from service.usecases import batches, fits, metrics, queues, versions, warden
from service.usecases.batches import load_training_data
from service.usecases.params import FitParams, fit_status, version_number

from ._data import as_table, setup_metric

ROOT = Path(__file__).resolve().parents[2]


def _ctx_with(ctx: Context, **changes) -> Context:
    return Context.build(ctx.settings.replace(**changes), connection=ctx.redis)


def _expected_decision(ctx: Context, name: str, params: dict, active: int) -> bool:
    """Recompute the when_better rule outside the service: the new configuration's held-out
    ARI against the active version's configuration re-scored on the same folds."""
    p = FitParams.parse(params).as_dict()
    data = load_training_data(ctx, name)
    sel = MetricSelector(method=p["method"], alphas=p["alphas"], n_folds=p["n_folds"],
                         max_rank=p["max_rank"], k_max=p["k_max"], random_state=p["seed"])
    sel.fit([(d["X"], np.asarray(d["labels"])) for d in data], [d["stats"] for d in data])
    old = versions.get_version(ctx, name, version_number(active))
    old_ari = sel.evaluate(old["method"], old["alpha"])["score"]["ari"]
    return sel.report_["score"]["ari"] >= old_ari


def test_fit_succeeds_and_version_1_is_active(ctx: Context, run_worker_burst) -> None:
    _, _, ids = setup_metric(ctx, "m", dataset="wine", n=4)
    fit, created = fits.request_fit(ctx, "m", FitParams.parse({}), "etl")
    assert created and fit["status"] == "waiting" and fit["version"] is None
    job_id = ctx.storage.fits.get(fit["fit_id"]).job_id
    run_worker_burst(ctx)
    done = fits.get_fit(ctx, fit["fit_id"])
    assert done["status"] == "succeeded", done
    assert (done["version"], done["progress"], done["attempts"]) == (1, 1.0, 1)
    assert done["decision"]["activated"] is True
    assert "first version" in done["decision"]["reason"]
    assert done["started_at"] <= done["ended_at"]
    meta = Job.fetch(job_id, connection=ctx.redis).get_meta()
    # the job carries ids only; progress lives in the fit record
    assert meta == {"fit_id": fit["fit_id"], "key_prefix": ctx.settings.key_prefix}
    m = metrics.get_metric(ctx, "m")
    assert (m["active_version"], m["versions"]) == (1, 1)
    v = versions.get_version(ctx, "m", version_number(1))
    assert v["active"] and v["parent"] is None and v["fit_id"] == fit["fit_id"]
    stored = {b["batch_id"]: b["sha256"] for b in batches.list_batches(ctx, "m")["batches"]}
    assert {b["batch_id"]: b["sha256"] for b in v["batches"]} == stored
    assert [b["batch_id"] for b in v["batches"]] == ids
    d = len(m["features"])
    assert np.asarray(v["metric"]["matrix"]).shape == (d, d)
    assert v["metric"]["features"] == m["features"]
    assert set(v["score"]) == {"ari", "baseline_ari", "nmi", "baseline_nmi", "rand",
                               "baseline_rand"}
    assert v["report"]["score"] == v["score"]
    [entry] = versions.history(ctx, "m")["history"]
    assert (entry["from"], entry["to"], entry["who"], entry["fit_id"]) == (
        None, 1, "etl", fit["fit_id"])
    q = queues.queue_overview(ctx)["queues"][0]
    assert (q["waiting"], q["fitting"], q["failed"], q["done"]) == (0, 0, 0, 1)


def test_activation_policies(ctx: Context, run_worker_burst) -> None:
    setup_metric(ctx, "m", dataset="wine", n=4)

    def fit(params: dict) -> dict:
        f, _ = fits.request_fit(ctx, "m", FitParams.parse(params), "admin")
        run_worker_burst(ctx)
        out = fits.get_fit(ctx, f["fit_id"])
        assert out["status"] == "succeeded", out
        return out

    first = fit({})
    assert first["version"] == 1 and first["decision"]["activated"]
    learned = versions.get_version(ctx, "m", version_number(1))
    assert learned["method"] != "euclidean"  # on wine a learned metric wins the CV

    worse = {"method": "euclidean"}
    expected = _expected_decision(ctx, "m", worse, active=1)
    second = fit(worse)
    assert second["decision"]["activated"] is expected is False
    assert "stays active" in second["decision"]["reason"]
    assert metrics.get_metric(ctx, "m")["active_version"] == 1
    assert versions.get_version(ctx, "m", version_number(2))["parent"] == 1

    never = fit({"activate": "by_hand", "seed": 1})
    assert never["decision"]["activated"] is False
    assert never["decision"]["reason"].startswith("activate=by_hand")

    forced = fit({"method": "euclidean", "activate": "at_once"})
    assert forced["decision"]["activated"] is True
    assert metrics.get_metric(ctx, "m")["active_version"] == forced["version"] == 4

    expected = _expected_decision(ctx, "m", {}, active=4)
    back = fit({})
    assert back["decision"]["activated"] is expected is True
    assert metrics.get_metric(ctx, "m")["active_version"] == 5
    listed = versions.list_versions(ctx, "m")["versions"]
    assert [v["version"] for v in listed] == [1, 2, 3, 4, 5]
    assert [v["active"] for v in listed] == [False, False, False, False, True]
    moves = [(h["from"], h["to"]) for h in versions.history(ctx, "m")["history"]]
    assert moves == [(None, 1), (1, 4), (4, 5)]


def test_identical_queued_fit_is_returned_not_queued_again(ctx: Context,
                                                           run_worker_burst) -> None:
    setup_metric(ctx, "m", n=3)
    a, created_a = fits.request_fit(ctx, "m", FitParams.parse({"method": "diagonal"}), "admin")
    b, created_b = fits.request_fit(
        ctx, "m", FitParams.parse({"method": "diagonal", "n_folds": 5}), "etl")
    assert created_a and not created_b and a["fit_id"] == b["fit_id"]
    c, created_c = fits.request_fit(
        ctx, "m", FitParams.parse({"method": "diagonal", "seed": 3}), "admin")
    assert created_c and c["fit_id"] != a["fit_id"]
    assert ctx.queue.count == 2
    run_worker_burst(ctx)
    assert {f["status"] for f in fits.list_fits(ctx, "m")["fits"]} == {"succeeded"}
    d, created_d = fits.request_fit(ctx, "m", FitParams.parse({"method": "diagonal"}), "admin")
    assert created_d and d["fit_id"] != a["fit_id"]


def test_failed_fit_is_retried_on_request(ctx: Context, run_worker_burst) -> None:
    feats, data, ids = setup_metric(ctx, "m", n=2)
    fit, _ = fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    batches.delete_batch(ctx, "m", ids[1])  # the fit will find a single batch
    run_worker_burst(ctx)
    failed = fits.get_fit(ctx, fit["fit_id"])
    assert failed["status"] == "failed" and "at least 2" in failed["error"]
    assert failed["version"] is None and metrics.get_metric(ctx, "m")["versions"] == 0
    assert fits.list_fits(ctx, status=fit_status("failed"))["fits"] == [failed]
    with pytest.raises(fits.Conflict):
        fits.retry_fit(ctx, fit["fit_id"], "admin")  # still one batch
    X, y = data[1]
    batches.add_batch(ctx, "m", as_table(feats, X, y.tolist()))
    again = fits.retry_fit(ctx, fit["fit_id"], "admin")
    assert again["fit_id"] == fit["fit_id"] and again["status"] == "waiting"
    assert again["error"] is None
    run_worker_burst(ctx)
    done = fits.get_fit(ctx, fit["fit_id"])
    assert (done["status"], done["version"], done["attempts"]) == ("succeeded", 1, 2)
    with pytest.raises(fits.Conflict):
        fits.retry_fit(ctx, fit["fit_id"], "admin")


def test_fit_of_a_deleted_metric_leaves_nothing(ctx: Context, run_worker_burst) -> None:
    setup_metric(ctx, "m", n=2)
    fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    metrics.delete_metric(ctx, "m")
    run_worker_burst(ctx)
    assert list(ctx.redis.scan_iter(match=ctx.settings.key_prefix + ":metric:*")) == []
    assert metrics.list_metrics(ctx) == {"metrics": [], "next_cursor": None}


def test_metric_deleted_during_the_fit(ctx: Context, run_worker_burst, monkeypatch) -> None:
    """The fit's commit finds the metric gone: the job ends cleanly, nothing is written,
    and a metric re-created under the same name starts again at version 1."""
    setup_metric(ctx, "m", n=2)
    original = MetricSelector.fit

    def delete_then_fit(self, *args, **kwargs):
        metrics.delete_metric(Context.build(ctx.settings), "m")
        return original(self, *args, **kwargs)

    monkeypatch.setattr(MetricSelector, "fit", delete_then_fit)
    fit, _ = fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    job_id = ctx.storage.fits.get(fit["fit_id"]).job_id
    run_worker_burst(ctx)
    assert Job.fetch(job_id, connection=ctx.redis).get_status() == "finished"
    assert ctx.queue.failed_job_registry.count == 0
    assert metrics.list_metrics(ctx) == {"metrics": [], "next_cursor": None}
    assert ctx.storage.versions.numbers("m") == [] and ctx.storage.fits.get(fit["fit_id"]) is None
    monkeypatch.setattr(MetricSelector, "fit", original)
    setup_metric(ctx, "m", n=2)
    again, _ = fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    run_worker_burst(ctx)
    assert fits.get_fit(ctx, again["fit_id"])["version"] == 1


def test_lost_queue_job_is_reported_failed(ctx: Context, run_worker_burst) -> None:
    setup_metric(ctx, "m", n=2)
    fit, _ = fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    Job.fetch(ctx.storage.fits.get(fit["fit_id"]).job_id, connection=ctx.redis).delete()
    # reads never write: the fit shows queued until the warden looks at it
    assert fits.get_fit(ctx, fit["fit_id"])["status"] == "waiting"
    assert warden.sweep(ctx) == 1 and warden.sweep(ctx) == 0
    lost = fits.get_fit(ctx, fit["fit_id"])
    assert lost["status"] == "failed" and "no longer exists" in lost["error"]
    # the dedupe slot is free again, and the fit can be retried
    other, created = fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    assert created and other["fit_id"] != fit["fit_id"]
    fits.retry_fit(ctx, fit["fit_id"], "admin")
    run_worker_burst(ctx)
    assert fits.get_fit(ctx, fit["fit_id"])["status"] == "succeeded"


@pytest.mark.parametrize("taken", [True, False])
def test_a_stranded_job_is_issued_again(ctx: Context, run_worker_burst, taken: bool) -> None:
    """A crash between the queue's moves: a worker took the job (and, with ``taken``,
    marked it started) but died before the fit began. The queue's real dequeue and
    bookkeeping calls make that state; no worker runs the job. The warden gives the
    fit a new job once the old one is older than ``stranded_seconds``."""
    from rq import Queue, Worker

    setup_metric(ctx, "m", n=2)
    fit, _ = fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    old_job = ctx.storage.fits.get(fit["fit_id"]).job_id
    job, _ = Queue.dequeue_any([ctx.queue], timeout=None, connection=ctx.redis)
    assert job.id == old_job and ctx.queue.count == 0
    if taken:
        Worker([ctx.queue], connection=ctx.redis,
               name=f"{ctx.settings.key_prefix}-gone").prepare_job_execution(job)
    # within the grace period it is left alone (a live worker begins a fit at once)
    assert warden.sweep(ctx) == 0
    assert ctx.storage.fits.get(fit["fit_id"]).job_id == old_job
    eager = _ctx_with(ctx, stranded_seconds=0)
    assert warden.sweep(eager) == 1 and warden.sweep(eager) == 0
    again = ctx.storage.fits.get(fit["fit_id"])
    assert again.status.value == "waiting" and again.job_id != old_job
    assert again.attempts == 0 and "lost" in again.error
    assert ctx.queue.count == 1
    run_worker_burst(ctx)
    done = fits.get_fit(ctx, fit["fit_id"])
    assert done["status"] == "succeeded" and done["attempts"] == 1, done


def test_timeout_fails_the_fit(ctx: Context, run_worker_burst, monkeypatch) -> None:
    """The work horse exceeds Settings.fit_timeout and RQ kills it (no retries left)."""
    short = _ctx_with(ctx, fit_timeout=1, fit_retries=0)
    setup_metric(short, "m", n=2)
    monkeypatch.setattr(MetricSelector, "fit", lambda self, *a, **k: time.sleep(30))
    fit, _ = fits.request_fit(short, "m", FitParams.parse({}), "admin")
    started = time.monotonic()
    run_worker_burst(short)
    assert time.monotonic() - started < 25
    out = fits.get_fit(short, fit["fit_id"])
    assert out["status"] == "failed" and "JobTimeoutException" in out["error"], out


def _kill_self(self, *args, **kwargs):
    os.kill(os.getpid(), signal.SIGKILL)


@pytest.mark.parametrize("retries", [1, 0])
def test_killed_work_horse_is_retried_or_failed(ctx: Context, run_worker_burst, monkeypatch,
                                                retries: int) -> None:
    """The forked work horse dies by SIGKILL on its first attempt only."""
    c = _ctx_with(ctx, fit_retries=retries)
    setup_metric(c, "m", n=2)
    original = MetricSelector.fit
    marker = c.storage.key("test", "horse-killed")

    def die_once(self, *args, **kwargs):
        if c.redis.incr(marker) == 1:
            _kill_self(self)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(MetricSelector, "fit", die_once)
    fit, _ = fits.request_fit(c, "m", FitParams.parse({}), "admin")
    run_worker_burst(c)
    out = fits.get_fit(c, fit["fit_id"])
    if retries:
        assert (out["status"], out["attempts"], out["version"]) == ("succeeded", 2, 1), out
    else:
        assert out["status"] == "failed" and "terminated" in out["error"], out


WORKER_SCRIPT = """
import os, signal, sys
from service.config import Settings
from service.core import MetricSelector
from workers.worker import run_worker
MetricSelector.fit = lambda self, *a, **k: os.kill(os.getpid(), signal.SIGKILL)
run_worker(Settings.from_env(), burst=True, name=sys.argv[1], simple=True)
"""


@pytest.mark.parametrize("retries", [1, 0])
def test_worker_killed_mid_fit(ctx: Context, run_worker_burst, retries: int) -> None:
    """A worker process dies by SIGKILL while running a fit. Its attempt's lease lapses
    (``lease_seconds``); the warden's next sweep gives the fit a new job, which another
    worker completes, or fails it when no attempt is left."""
    c = _ctx_with(ctx, fit_retries=retries, lease_seconds=1)
    setup_metric(c, "m", n=2)
    fit, _ = fits.request_fit(c, "m", FitParams.parse({}), "admin")
    s = c.settings
    env = {**os.environ, "PYTHONPATH": str(ROOT), "LIKEWISE_REDIS_URL": s.redis_url,
           "LIKEWISE_KEY_PREFIX": s.key_prefix, "LIKEWISE_QUEUE": s.queue_name,
           "LIKEWISE_FIT_TIMEOUT": "120", "LIKEWISE_FIT_RETRIES": str(retries),
           "LIKEWISE_LEASE_SECONDS": "1"}
    proc = subprocess.run([sys.executable, "-c", WORKER_SCRIPT, f"{s.key_prefix}-dying"],
                          env=env, cwd=ROOT, timeout=120, capture_output=True)
    assert proc.returncode == -signal.SIGKILL, proc.stderr.decode()[-2000:]
    first_job = c.storage.fits.get(fit["fit_id"]).job_id
    assert fits.get_fit(c, fit["fit_id"])["status"] == "running"  # reads never write
    # the lease lapses within its TTL (bounded wait on Redis, not a sleep)
    deadline = time.monotonic() + 10
    while c.storage.fits.lease_holder(fit["fit_id"]) is not None:
        assert time.monotonic() < deadline, "the dead attempt's lease did not lapse"
        time.sleep(0.1)
    assert warden.sweep(c) == 1
    out = fits.get_fit(c, fit["fit_id"])
    assert "worker running this fit stopped" in out["error"], out
    assert not Job.exists(first_job, connection=c.redis)  # the dead job is forgotten
    if retries:
        assert out["status"] == "waiting"
        assert c.storage.fits.get(fit["fit_id"]).job_id != first_job
        run_worker_burst(c)
        out = fits.get_fit(c, fit["fit_id"])
        assert (out["status"], out["attempts"], out["version"]) == ("succeeded", 2, 1), out
    else:
        assert out["status"] == "failed"
        assert fits.retry_fit(c, fit["fit_id"], "admin")["status"] == "waiting"


def test_the_queue_view_hides_a_fit_of_a_metric_the_caller_may_not_touch(ctx: Context) -> None:
    """A worker that has taken a fit (made with the queue's own dequeue and bookkeeping
    calls) names it and its metric, except to a caller restricted to other metrics."""
    from rq import Queue, Worker

    setup_metric(ctx, "m", n=2)
    fit, _ = fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    job, _ = Queue.dequeue_any([ctx.queue], timeout=None, connection=ctx.redis)
    worker = Worker([ctx.queue], connection=ctx.redis, name=f"{ctx.settings.key_prefix}-busy")
    worker.register_birth()
    try:
        worker.prepare_execution(job)
        [seen] = queues.queue_overview(ctx)["workers"]
        assert (seen["current_fit"], seen["current_metric"]) == (fit["fit_id"], "m")
        [hidden] = queues.queue_overview(ctx, visible=lambda name: name != "m")["workers"]
        assert (hidden["current_fit"], hidden["current_metric"]) == (None, None)
        assert hidden["name"] == seen["name"]
    finally:
        worker.register_death()


def test_a_worker_on_a_grouping_run_reads_as_grouping(ctx: Context, run_worker_burst) -> None:
    """A worker that took a grouping run's job (the queue's own dequeue and bookkeeping
    calls) is shown ``grouping``, with no current fit; iris (scikit-learn's copy)."""
    from rq import Queue, Worker

    from service.usecases import grouping_runs

    feats, data, _ = setup_metric(ctx, "m", n=2)
    fit, _ = fits.request_fit(ctx, "m", FitParams.parse({}), "admin")
    run_worker_burst(ctx)
    assert fits.get_fit(ctx, fit["fit_id"])["status"] == "succeeded"
    run = grouping_runs.start_run(ctx, "m", as_table(feats, data[0][0]))
    job, _ = Queue.dequeue_any([ctx.queue], timeout=None, connection=ctx.redis)
    assert run["run_id"] in job.id
    worker = Worker([ctx.queue], connection=ctx.redis, name=f"{ctx.settings.key_prefix}-run")
    worker.register_birth()
    try:
        worker.prepare_execution(job)
        worker.set_state("busy")
        [seen] = queues.queue_overview(ctx)["workers"]
        assert (seen["state"], seen["current_fit"], seen["current_metric"]) == (
            "grouping", None, None)
    finally:
        worker.register_death()
