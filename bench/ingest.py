"""Batch ingest by body format, and the web process's peak memory per format.

1. Rate: a 50,000 × 20 batch posted through the Flask app (in process, real Redis)
   as JSON (columns + rows), CSV, an Arrow IPC stream and Parquet; the median time
   per post and its rate against JSON's, measured side by side in one run. Raw
   ``json.loads`` + ``np.asarray`` of the same JSON body (the standard library, no
   checks) is the reference of JSON ingest. Targets: JSON ingest ≤ 1.2 × that
   (issue 9); Arrow ≥ 5 × the JSON rate (issue 10).
2. Memory: for a batch whose body is about 100 MiB in each format, a fresh process
   reads the body and posts it once; the growth of its peak resident set
   (``ru_maxrss`` after the post against the resident set before it) as a multiple
   of the body's size.

The matrix comes from scikit-learn's ``make_blobs`` (a seeded generator: 20 float
features, 5 groups).

    .venv/bin/python bench/ingest.py [--quick]
"""

from __future__ import annotations

import argparse
import io
import json
import os
import resource
import secrets
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import pyarrow as pa  # noqa: E402
import pyarrow.csv as pa_csv  # noqa: E402
import pyarrow.parquet as pq  # noqa: E402
from sklearn.datasets import make_blobs  # noqa: E402

from bench._redis import clean_up, redis_url, verdict  # noqa: E402
from service.api import create_app  # noqa: E402
from service.config import Settings  # noqa: E402
from service.context import Context  # noqa: E402

D = 20
FEATURES = [f"f{j:02d}" for j in range(D)]
FORMATS = {
    "json": "application/json",
    "csv": "text/csv",
    "arrow": "application/vnd.apache.arrow.stream",
    "parquet": "application/vnd.apache.parquet",
}
MIB = 1024 * 1024


def data(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    X, y = make_blobs(n_samples=n, n_features=D, centers=5, random_state=seed)
    return X, y.astype(np.int64)


def body(fmt: str, X: np.ndarray, y: np.ndarray) -> bytes:
    if fmt == "json":
        return json.dumps({"columns": FEATURES, "rows": X.tolist(),
                           "groups": y.tolist()}).encode()
    table = pa.table({**{f: X[:, j] for j, f in enumerate(FEATURES)}, "group": y})
    sink = io.BytesIO()
    if fmt == "csv":
        pa_csv.write_csv(table, sink)
    elif fmt == "arrow":
        with pa.ipc.new_stream(sink, table.schema) as writer:
            writer.write_table(table)
    else:
        pq.write_table(table, sink)
    return sink.getvalue()


def _app(url: str, prefix: str):
    big = 512 * MIB
    settings = Settings(redis_url=url, key_prefix=prefix, admin_token="bench",
                        max_batch_records=10_000_000, max_batch_bytes=big,
                        max_request_bytes=big)
    ctx = Context.build(settings)
    app = create_app(context=ctx)
    client = app.test_client()
    headers = {"Authorization": "Bearer bench"}
    resp = client.put("/v1/metrics/bench", json={"features": FEATURES}, headers=headers)
    assert resp.status_code == 201, resp.get_json()
    return ctx, client, headers


def _post(client, headers, fmt: str, raw: bytes) -> float:
    url = "/v1/metrics/bench/batches?allow_duplicate=true"
    if fmt != "json":
        url += "&group_column=group"
    started = time.perf_counter()
    resp = client.post(url, data=raw, content_type=FORMATS[fmt], headers=headers)
    elapsed = time.perf_counter() - started
    assert resp.status_code == 201, resp.get_data(as_text=True)[:500]
    return elapsed


def rates(n: int, repeats: int) -> None:
    url, server = redis_url()
    prefix = f"lwb-{secrets.token_hex(4)}"
    ctx, client, headers = _app(url, prefix)
    X, y = data(n)
    bodies = {fmt: body(fmt, X, y) for fmt in FORMATS}
    times: dict[str, list[float]] = {fmt: [] for fmt in FORMATS}
    floor = []
    try:
        small = data(200)
        for fmt in FORMATS:  # first-use costs (imports, pools), not measured
            _post(client, headers, fmt, body(fmt, *small))
        for _ in range(repeats):  # interleaved, so load drifts hit every format alike
            for fmt, raw in bodies.items():
                times[fmt].append(_post(client, headers, fmt, raw))
            started = time.perf_counter()
            doc = json.loads(bodies["json"])
            np.asarray(doc["rows"], dtype=float)
            floor.append(time.perf_counter() - started)
    finally:
        clean_up(ctx.redis, prefix, server)
    print(f"1. Ingest of one {n:,} × {D} batch, median of {repeats} posts per format "
          f"(load average {os.getloadavg()[0]:.2f})")
    print(f"{'format':>8} {'body MiB':>9} {'s/post':>8} {'records/s':>11} {'× JSON rate':>12}")
    json_s = statistics.median(times["json"])
    for fmt in FORMATS:
        s = statistics.median(times[fmt])
        print(f"{fmt:>8} {len(bodies[fmt]) / MIB:>9.1f} {s:>8.3f} {n / s:>11,.0f} "
              f"{json_s / s:>12.1f}")
    floor_s = statistics.median(floor)
    print(f"raw json.loads + np.asarray of the JSON body: {floor_s:.3f} s "
          f"(JSON ingest is {json_s / floor_s:.2f}× that)")
    print(f"target: JSON ingest ≤ 1.2 × raw json.loads + np.asarray: {json_s / floor_s:.2f}× — "
          f"{verdict(json_s / floor_s <= 1.2)}")
    arrow_x = json_s / statistics.median(times["arrow"])
    print(f"target: Arrow ≥ 5 × the JSON rate: {arrow_x:.1f}× — {verdict(arrow_x >= 5)}")


def _rss() -> int:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def _one_post(fmt: str, path: str) -> None:
    """Child process: read one body, post it, print the peak RSS growth (bytes)."""
    url, server = redis_url()
    prefix = f"lwb-{secrets.token_hex(4)}"
    ctx, client, headers = _app(url, prefix)
    raw = Path(path).read_bytes()  # held in memory before the post, as a WSGI server holds it
    try:
        _post(client, headers, fmt, body(fmt, *data(200)))  # first-use costs, not measured
        before = _rss()
        _post(client, headers, fmt, raw)
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    finally:
        clean_up(ctx.redis, prefix, server)
    print(json.dumps({"body": len(raw), "growth": max(peak - before, 0)}))


def memory(target_mib: int) -> None:
    print(f"\n2. Peak memory of a fresh process handling one post of about {target_mib} MiB "
          f"(load average {os.getloadavg()[0]:.2f})")
    print(f"{'format':>8} {'records':>10} {'body MiB':>9} {'peak growth MiB':>16} "
          f"{'× body':>7}")
    probe = 2000
    X, y = data(probe)
    with tempfile.TemporaryDirectory() as tmp:
        for fmt in FORMATS:
            n = int(target_mib * MIB / (len(body(fmt, X, y)) / probe))
            path = Path(tmp) / fmt
            path.write_bytes(body(fmt, *data(n)))
            out = subprocess.run([sys.executable, __file__, "--one", fmt, str(path)],
                                 cwd=ROOT, capture_output=True, text=True, check=True,
                                 timeout=900)
            got = json.loads(out.stdout.strip().splitlines()[-1])
            path.unlink()
            print(f"{fmt:>8} {n:>10,} {got['body'] / MIB:>9.1f} "
                  f"{got['growth'] / MIB:>16.1f} {got['growth'] / got['body']:>7.2f}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="small sizes (a smoke run)")
    parser.add_argument("--one", nargs=2, metavar=("FORMAT", "BODY"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.one:
        _one_post(args.one[0], args.one[1])
    elif args.quick:
        rates(2000, 1)
        memory(2)
    else:
        rates(50_000, 5)
        memory(100)
