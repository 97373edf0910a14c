"""Fit latency through the queue against the same fit in process.

A real worker process (``likewise worker``) waits on a real Redis; each trial asks
for a fit of a 2-batch metric (iris, Fisher 1936, scikit-learn's copy) through the
fit use case and waits until it succeeded. Reported per trial: the wait before a
worker started the fit, the time from request to version, and the same selector
run in this process on the same batches. Target (issue 9): request-to-version of a
2-batch metric ≤ 1.5 × the in-process time + 0.3 s.

    .venv/bin/python bench/fit_latency.py [--trials N]

Redis: ``LIKEWISE_REDIS_URL``, else 127.0.0.1:6379/13 if it answers, else an
embedded server for the run.
"""

from __future__ import annotations

import argparse
import os
import secrets
import statistics
import subprocess
import sys
import time
from datetime import datetime
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from bench._redis import clean_up, redis_url  # noqa: E402
from service import jobqueue  # noqa: E402
from service.config import Settings  # noqa: E402
from service.context import Context  # noqa: E402
from service.core import MetricSelector  # noqa: E402
from service.tables import from_json  # noqa: E402
from service.usecases import batches, fits, metrics  # noqa: E402
from service.usecases.params import FitParams  # noqa: E402
from tests.datasets import load_open, make_batches  # noqa: E402

FEATURES = ["sepal_length", "sepal_width", "petal_length", "petal_width"]


def _until(predicate, timeout: float, what: str):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(0.005)
    raise SystemExit(f"timed out waiting for {what}")


def _ts(iso: str) -> float:
    return datetime.fromisoformat(iso.replace("Z", "+00:00")).timestamp()


def main(trials: int) -> None:
    url, server = redis_url()
    prefix = f"lwb-{secrets.token_hex(4)}"
    settings = Settings(redis_url=url, key_prefix=prefix, admin_token="bench")
    ctx = Context.build(settings)
    X, y = load_open("iris")
    data = make_batches(X, y, 2, np.random.default_rng(0), classes_per_batch=(3, 3),
                        group_size=(15, 25))
    metrics.put_metric(ctx, "bench", FEATURES)
    for Xb, yb in data:
        table = from_json({"columns": FEATURES, "rows": Xb.tolist()})
        batches.add_batch(ctx, "bench", table.with_groups([int(v) for v in yb]))
    env = {**os.environ, "PYTHONPATH": str(ROOT), "LIKEWISE_REDIS_URL": url,
           "LIKEWISE_KEY_PREFIX": prefix}
    worker = subprocess.Popen([sys.executable, "-m", "service.cli", "worker", "--name",
                               f"{prefix}-w"], env=env, cwd=ROOT,
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    rows = []
    try:
        _until(lambda: [w.state.value for w in jobqueue.workers(ctx)] == ["ready"], 60,
               "the worker")
        for t in range(trials):
            params = {"seed": t, "method": "auto"}
            sel = MetricSelector(random_state=t)
            started = time.perf_counter()
            sel.fit([(Xb, yb) for Xb, yb in data])
            core = time.perf_counter() - started
            asked = time.time()
            fit, _ = fits.request_fit(ctx, "bench", FitParams.parse(params), "bench")
            done = _until(lambda fid=fit["fit_id"]: (f := fits.get_fit(ctx, fid))["status"]
                          in ("succeeded", "failed") and f, 120, "the fit")
            total = time.time() - asked
            if done["status"] != "succeeded":
                raise SystemExit(f"fit failed: {done['error']}")
            wait = _ts(done["started_at"]) - _ts(done["created_at"])
            rows.append((core, wait, total))
    finally:
        worker.terminate()
        worker.wait(timeout=30)
        clean_up(ctx.redis, prefix, server)
    print(f"Fit latency, 2 iris batches, {trials} trial(s), one idle worker; "
          f"load average {os.getloadavg()[0]:.2f}")
    print(f"{'trial':>5} {'in process s':>13} {'wait to start s':>16} {'request→version s':>18}")
    for i, (core, wait, total) in enumerate(rows):
        print(f"{i:>5} {core:>13.3f} {wait:>16.3f} {total:>18.3f}")
    core_m = statistics.median(r[0] for r in rows)
    total_m = statistics.median(r[2] for r in rows)
    wait_m = statistics.median(r[1] for r in rows)
    limit = 1.5 * core_m + 0.3
    print(f"median: in process {core_m:.3f} s, wait {wait_m:.3f} s, "
          f"request→version {total_m:.3f} s ({total_m / core_m:.1f}× in process)")
    print(f"target: request→version ≤ 1.5 × in process + 0.3 s = {limit:.3f} s: "
          f"{'met' if total_m <= limit else 'NOT met'}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser()
    parser.add_argument("--trials", type=int, default=7)
    main(parser.parse_args().trials)
