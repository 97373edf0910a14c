"""Queue overview and readiness with real RQ workers (burst and a live subprocess)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

from rq import Worker

from service.context import Context
from service.usecases import fits, queues
from service.usecases.params import FitParams

from ._data import setup_metric

ROOT = Path(__file__).resolve().parents[2]


def test_overview_counts_waiting_and_done(ctx: Context, run_worker_burst) -> None:
    empty = queues.queue_overview(ctx)
    assert empty["queues"] == [{"name": ctx.settings.queue_name, "waiting": 0, "fitting": 0,
                                "failed": 0, "done": 0, "oldest_waiting_seconds": None}]
    setup_metric(ctx, "m", n=2)
    before = time.time()
    fits.request_fit(ctx, "m", FitParams.parse({"method": "euclidean"}), "admin")
    enqueued = time.time()
    fits.request_fit(ctx, "m", FitParams.parse({"method": "diagonal"}), "admin")
    asked = time.time()
    q = queues.queue_overview(ctx)["queues"][0]
    answered = time.time()
    # the oldest job was enqueued between `before` and `enqueued`, the age read between
    # `asked` and `answered` (the queue stores times to the microsecond)
    assert q["waiting"] == 2
    assert asked - enqueued - 1e-3 <= q["oldest_waiting_seconds"] <= answered - before + 1e-3
    run_worker_burst(ctx)
    q = queues.queue_overview(ctx)["queues"][0]
    assert (q["waiting"], q["fitting"], q["done"], q["oldest_waiting_seconds"]) == (
        0, 0, 2, None)


def _wait(predicate, timeout: float = 30.0) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(0.1)
    return False


def test_readiness_needs_a_live_worker(ctx: Context) -> None:
    ok, detail = queues.readiness(ctx)
    assert not ok and detail == {"redis": True, "workers_seen": 0}
    s = ctx.settings
    name = f"{s.key_prefix}-live"
    env = {**os.environ, "PYTHONPATH": str(ROOT), "LIKEWISE_REDIS_URL": s.redis_url,
           "LIKEWISE_KEY_PREFIX": s.key_prefix, "LIKEWISE_QUEUE": s.queue_name}
    script = ("import sys\nfrom service.config import Settings\n"
              "from workers.worker import run_worker\n"
              "run_worker(Settings.from_env(), name=sys.argv[1])\n")
    proc = subprocess.Popen([sys.executable, "-c", script, name], env=env, cwd=ROOT,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        assert _wait(lambda: queues.readiness(ctx)[0]), proc.stderr
        ok, detail = queues.readiness(ctx)
        assert detail == {"redis": True, "workers_seen": 1}
        # an idle worker reads as ready, in our words, once it listens on the queue
        assert _wait(lambda: [w["state"] for w in queues.queue_overview(ctx)["workers"]]
                     == ["ready"])
        [w] = queues.queue_overview(ctx)["workers"]
        assert w["name"] == name and w["queues"] == [s.queue_name]
        assert w["last_heartbeat"].endswith("Z") and w["current_fit"] is None
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=30)
    assert _wait(lambda: not Worker.all(queue=ctx.queue))
    assert queues.readiness(ctx) == (False, {"redis": True, "workers_seen": 0})


def test_an_idle_worker_stays_ready_past_the_seen_window(ctx: Context) -> None:
    """Readiness wants a heartbeat within ``worker_seen_seconds``; an idle worker must
    renew it in time (RQ's default renews every 405 s). Window of 10 s here; the check
    runs for 1.5 windows after the worker is first seen."""
    seen = 10
    s = ctx.settings.replace(worker_seen_seconds=seen)
    short = Context.build(s, connection=ctx.redis)
    env = {**os.environ, "PYTHONPATH": str(ROOT), "LIKEWISE_REDIS_URL": s.redis_url,
           "LIKEWISE_KEY_PREFIX": s.key_prefix, "LIKEWISE_QUEUE": s.queue_name,
           "LIKEWISE_WORKER_SEEN_SECONDS": str(seen)}
    script = ("import sys\nfrom service.config import Settings\n"
              "from workers.worker import run_worker\n"
              "run_worker(Settings.from_env(), name=sys.argv[1])\n")
    proc = subprocess.Popen([sys.executable, "-c", script, f"{s.key_prefix}-idle"], env=env,
                            cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        assert _wait(lambda: queues.readiness(short)[0]), proc.stderr
        until = time.monotonic() + 1.5 * seen
        while time.monotonic() < until:  # the worker stays idle all along
            assert queues.readiness(short)[0], "idle worker dropped out of readiness"
            time.sleep(0.5)
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=30)


def test_readiness_without_redis(ctx: Context) -> None:
    dead = Context.build(ctx.settings.replace(redis_url="redis://127.0.0.1:1/0"))
    try:
        assert queues.readiness(dead) == (False, {"redis": False, "workers_seen": 0})
    finally:
        dead.close()


def test_a_stopping_worker_ends_its_command_listener_promptly(ctx: Context) -> None:
    """A worker's stop ends the thread that listens for queue commands. RQ's own
    listener waits up to 60 s between wakes and its stop joins it (read in the installed
    rq 3.0 and redis-py 8.2 sources), so a stop that came after the thread had handled
    the unsubscribe reply waited out the whole minute (seen as a worker that took more
    than 60 s to honour SIGTERM). Here that order is forced: the reply is handled first,
    then the worker stops; it must be done within a few listener wakes."""
    from workers.worker import LISTEN_SECONDS, build_worker

    worker = build_worker(ctx.settings, f"{ctx.settings.key_prefix}-listener")
    worker.subscribe()
    assert _wait(lambda: worker.pubsub.subscribed, timeout=10)
    worker.pubsub.unsubscribe()
    assert _wait(lambda: not worker.pubsub.subscribed, timeout=10)  # the reply was handled
    stopper = threading.Thread(target=worker.unsubscribe, daemon=True)
    stopper.start()
    stopper.join(timeout=5 * LISTEN_SECONDS)
    assert not stopper.is_alive(), "the command listener kept the worker from stopping"
    assert not worker.pubsub_thread.is_alive()
