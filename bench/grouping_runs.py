"""Grouping runs end to end against ``group_records`` in process on the same matrix.

A metric is fitted on digits batches (UCI optical digits, scikit-learn's copy; the 20
most varied pixels), then 1,000,000 records drawn from the data set (plus a little
noise) are posted to ``POST /v1/metrics/{name}/grouping-runs`` as an Arrow IPC stream
and as Parquet, to gunicorn (one web process, as ``likewise run`` starts it) with one
``likewise worker``, both subprocesses on the same Redis. Measured per format: the
time to accept (the POST's answer), to done (polling the run), and to fetch every
page of results (JSON and Arrow pages of 65,536). The reference, in the same run: the
core's ``group_records`` on the same matrix in a fresh process, k = 5. Peak memory:
the web process's high-water mark (``VmHWM``) and the largest of the worker's
processes (``RUSAGE_CHILDREN``, the work horse that grouped), against the reference
process's own. Target (ours): accept + done + Arrow fetch ≤ 2 × the reference time.

    .venv/bin/python bench/grouping_runs.py [--records 1000000]
"""

from __future__ import annotations

import argparse
import io
import json
import os
import resource
import secrets
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from bench._redis import clean_up, fit_once, redis_url, verdict  # noqa: E402

K = 5
PAGE = 65_536
ARROW = "application/vnd.apache.arrow.stream"
PARQUET = "application/vnd.apache.parquet"
TOKEN = "bench"


def _reference(path: str) -> None:
    """In a fresh process: group the saved matrix with the saved metric; print JSON."""
    from service.core import FittedMetric, group_records

    saved = np.load(path)
    fitted = FittedMetric.from_dict(json.loads(str(saved["metric"])))
    X = saved["X"]
    started = time.perf_counter()
    g = group_records(fitted, X, k=K)
    seconds = time.perf_counter() - started
    np.save(path + ".labels.npy", g.labels)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(json.dumps({"seconds": seconds, "peak_mib": peak}))


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _hwm_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def _children(pid: int) -> list[int]:
    path = Path(f"/proc/{pid}/task/{pid}/children")
    return [int(p) for p in path.read_text().split()] if path.exists() else []


def _wait_ready(url: str, deadline: float) -> None:
    import httpx

    while time.monotonic() < deadline:
        try:
            if httpx.get(url + "/healthz", timeout=1).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    raise SystemExit("the web process did not start")


def _bodies(X: np.ndarray, feats: list[str]) -> dict[str, bytes]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.table({f: X[:, j] for j, f in enumerate(feats)})
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    parquet = io.BytesIO()
    pq.write_table(table, parquet)
    return {"arrow": sink.getvalue().to_pybytes(), "parquet": parquet.getvalue()}


def main(n: int) -> None:
    from likewise_client import Client
    from service.config import MIB, Settings
    from service.context import Context
    from service.usecases import metrics, versions
    from tests.datasets import load_open, make_batches

    url, server = redis_url()
    prefix = f"lwb-{secrets.token_hex(4)}"
    settings = Settings(redis_url=url, key_prefix=prefix, admin_token=TOKEN)
    ctx = Context.build(settings)
    X0, y0 = load_open("digits")
    X0 = X0[:, np.argsort(X0.std(axis=0))[::-1][:20]]
    feats = [f"px{j:02d}" for j in range(X0.shape[1])]
    rng = np.random.default_rng(1)
    X = X0[rng.integers(0, len(X0), n)] + rng.normal(0, 0.01, (n, X0.shape[1]))
    bodies = _bodies(X, feats)
    env = {**os.environ, "LIKEWISE_REDIS_URL": url, "LIKEWISE_KEY_PREFIX": prefix,
           "LIKEWISE_ADMIN_TOKEN": TOKEN, "LIKEWISE_LOG_LEVEL": "WARNING",
           "LIKEWISE_MAX_RUN_REQUEST_BYTES": str(1024 * MIB), "PYTHONPATH": str(ROOT)}
    port = _free_port()
    procs: list[subprocess.Popen] = []
    rows, web_peak, worker_peak, same = [], float("nan"), float("nan"), True
    tmp = tempfile.mkdtemp(prefix="lwb-runs-")
    try:
        metrics.put_metric(ctx, "bench", feats)
        fit_once(ctx, "bench", feats, make_batches(X0, y0, 6, np.random.default_rng(0)))
        metric_doc = versions.get_version(ctx, "bench", 1)["metric"]
        web = subprocess.Popen(
            [sys.executable, "-m", "gunicorn", "--config", "python:service.webserver",
             "--bind", f"127.0.0.1:{port}", "--workers", "1", "--timeout", "600",
             "--no-control-socket", "service.api:create_app()"],
            cwd=ROOT, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        worker = subprocess.Popen([sys.executable, "-m", "service.cli", "worker"], cwd=ROOT,
                                  env=env, stdout=subprocess.DEVNULL,
                                  stderr=subprocess.DEVNULL)
        procs += [web, worker]
        base = f"http://127.0.0.1:{port}"
        _wait_ready(base, time.monotonic() + 60)
        with Client(base, TOKEN, timeout=600) as lw:
            path = "/v1/metrics/bench/grouping-runs"
            fetched = {}
            for fmt, media in (("arrow", ARROW), ("parquet", PARQUET)):
                started = time.perf_counter()
                answer = lw.request("POST", path, content=bodies[fmt], content_type=media,
                                    params={"k": K})
                accepted = time.perf_counter()
                if answer.status != 202:
                    raise SystemExit(f"{fmt}: {answer.status} {answer.body}")
                run_id = answer.body["run_id"]
                run = lw.wait_for_grouping_run("bench", run_id, timeout=3600, interval=0.2)
                done = time.perf_counter()
                if run["status"] != "done":
                    raise SystemExit(f"{fmt}: the run failed: {run['error']}")
                labels = [v for p in lw.grouping_run_pages("bench", run_id, limit=PAGE)
                          for v in p["labels"]]
                json_fetch = time.perf_counter() - done
                t0 = time.perf_counter()
                table = lw.grouping_run_table("bench", run_id, limit=PAGE)
                arrow_fetch = time.perf_counter() - t0
                fetched[fmt] = np.asarray(labels)
                same &= table.column("label").to_pylist() == labels
                rows.append((fmt, len(bodies[fmt]) / MIB, accepted - started, done - accepted,
                             json_fetch, arrow_fetch))
        web_workers = _children(web.pid)
        web_peak = max((_hwm_mib(p) for p in web_workers), default=float("nan"))
        worker.send_signal(signal.SIGTERM)
        worker.wait(timeout=60)
        worker_peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        saved = os.path.join(tmp, "matrix.npz")
        np.savez(saved, X=X, metric=json.dumps(metric_doc))
        out = subprocess.run([sys.executable, __file__, "--reference", saved], cwd=ROOT,
                             capture_output=True, text=True, check=True, timeout=3600)
        ref = json.loads(out.stdout.strip().splitlines()[-1])
        ref_labels = np.load(saved + ".labels.npy")
        same &= all(np.array_equal(v, ref_labels) for v in fetched.values())
    finally:
        for proc in procs:
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
                try:
                    proc.wait(timeout=30)
                except subprocess.TimeoutExpired:
                    proc.kill()
        clean_up(ctx.redis, prefix, server)
    load = os.getloadavg()
    print(f"Grouping runs of {n:,} × {X.shape[1]} records, k = {K}, against group_records in "
          f"a fresh process (load average {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}, "
          f"{os.cpu_count()} cores)")
    print(f"reference: group_records {ref['seconds']:.2f} s, peak {ref['peak_mib']:.0f} MiB")
    print(f"{'body':>8} {'MiB':>6} {'accept s':>9} {'done s':>8} {'fetch json s':>13} "
          f"{'fetch arrow s':>14} {'total s':>8} {'total/ref':>10}")
    totals = []
    for fmt, mib, accept, done, fetch_json, fetch_arrow in rows:
        total = accept + done + fetch_arrow
        totals.append(total / ref["seconds"])
        print(f"{fmt:>8} {mib:>6.1f} {accept:>9.2f} {done:>8.2f} {fetch_json:>13.2f} "
              f"{fetch_arrow:>14.2f} {total:>8.2f} {total / ref['seconds']:>10.2f}")
    print(f"peak memory MiB: web {web_peak:.0f} ({web_peak / ref['peak_mib']:.2f} × ref), "
          f"worker {worker_peak:.0f} ({worker_peak / ref['peak_mib']:.2f} × ref), "
          f"raw matrix {X.nbytes / MIB:.0f}")
    print(f"same labels as in process: {'yes' if same else 'NO'}")
    worst = max(totals)
    print(f"target: accept + done + Arrow fetch ≤ 2 × group_records in process: "
          f"{worst:.2f} — {verdict(worst <= 2 and same)}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser()
    parser.add_argument("--records", type=int, default=1_000_000)
    parser.add_argument("--reference", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.reference:
        _reference(args.reference)
    else:
        main(args.records)
