"""Grouping throughput of a live ``likewise run`` at 1, 4 and 16 clients.

The launcher starts gunicorn (default web processes: cores + 1) and one fit worker on
a real Redis; a metric is fitted on digits batches (UCI optical digits, scikit-learn's
copy; the 20 most varied pixels). Each client is a thread with its own connection
posting 1,000-record groupings (JSON, k = 5) for a fixed time. Reference, in the same
run: ``group_records`` on the same matrix in this process, its rate × cores.
Target (issue 9): with 4 clients, ≥ 90 % of that reference.

    .venv/bin/python bench/throughput.py [--seconds S] [--quick]
"""

from __future__ import annotations

import argparse
import http.client
import json
import os
import secrets
import socket
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from bench._redis import clean_up, redis_url, verdict  # noqa: E402
from likewise_client import Client  # noqa: E402
from service.core import FittedMetric, group_records  # noqa: E402
from tests.datasets import load_open, make_batches  # noqa: E402

TOKEN = "bench-token"
N, K = 1000, 5


def _port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _clients(host: str, port: int, body: bytes, clients: int, seconds: float) -> float:
    done = [0] * clients
    stop = time.monotonic() + seconds
    headers = {"Authorization": f"Bearer {TOKEN}", "Content-Type": "application/json"}

    def run(i: int) -> None:
        conn = http.client.HTTPConnection(host, port, timeout=60)
        while time.monotonic() < stop:
            conn.request("POST", "/v1/metrics/bench/groupings", body=body, headers=headers)
            resp = conn.getresponse()
            resp.read()
            if resp.status != 200:
                raise SystemExit(f"grouping answered {resp.status}")
            done[i] += 1
        conn.close()

    threads = [threading.Thread(target=run, args=(i,)) for i in range(clients)]
    started = time.monotonic()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return sum(done) / (time.monotonic() - started)


def main(seconds: float, levels: tuple[int, ...]) -> None:
    url, server = redis_url()
    prefix = f"lwb-{secrets.token_hex(4)}"
    port = _port()
    env = {**os.environ, "PYTHONPATH": str(ROOT), "LIKEWISE_REDIS_URL": url,
           "LIKEWISE_KEY_PREFIX": prefix, "LIKEWISE_ADMIN_TOKEN": TOKEN,
           "LIKEWISE_PORT": str(port), "LIKEWISE_WORKERS": "1",
           "LIKEWISE_LOG_LEVEL": "warning"}
    data_dir = tempfile.mkdtemp(prefix="lw-bench-")
    env["LIKEWISE_DATA_DIR"] = data_dir
    proc = subprocess.Popen([sys.executable, "-m", "service.cli", "run"], env=env, cwd=ROOT,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    base = f"http://127.0.0.1:{port}"
    try:
        lw = Client(base, TOKEN)
        deadline = time.monotonic() + 90
        while True:
            try:
                if lw.ready()[0]:
                    break
            except Exception:  # noqa: BLE001 — not up yet
                pass
            if time.monotonic() > deadline or proc.poll() is not None:
                raise SystemExit("the service did not start")
            time.sleep(0.2)
        X, y = load_open("digits")
        X = X[:, np.argsort(X.std(axis=0))[::-1][:20]]
        feats = [f"px{j:02d}" for j in range(20)]
        lw.put_metric("bench", feats)
        for Xb, yb in make_batches(X, y, 6, np.random.default_rng(0)):
            lw.post_batch("bench", Xb, yb, columns=feats)
        fit = lw.wait_for_fit(lw.start_fit("bench")["fit_id"], timeout=300)
        fitted = FittedMetric.from_dict(lw.get_version("bench", fit["version"])["metric"])
        rng = np.random.default_rng(1)
        Xn = X[rng.integers(0, len(X), N)]
        body = json.dumps({"columns": feats, "rows": Xn.tolist(), "k": K}).encode()
        started, calls = time.monotonic(), 0
        while time.monotonic() - started < seconds:
            group_records(fitted, Xn, k=K)
            calls += 1
        cores = os.cpu_count() or 1
        reference = calls / (time.monotonic() - started) * cores
        rates = {c: _clients("127.0.0.1", port, body, c, seconds) for c in levels}
        lw.close()
    finally:
        proc.terminate()
        proc.wait(timeout=60)
        import redis

        clean_up(redis.Redis.from_url(url), prefix, server)
    print(f"Grouping throughput, {N:,} × 20 records per request, k = {K}, {seconds:.0f} s "
          f"per level (load average {os.getloadavg()[0]:.2f}; web processes: cores + 1)")
    print(f"reference: group_records in process × {cores} cores = {reference:.1f} requests/s")
    print(f"{'clients':>8} {'requests/s':>11} {'× reference':>12}")
    for c, r in rates.items():
        print(f"{c:>8} {r:>11.1f} {r / reference:>12.2f}")
    if 4 in rates:
        share = rates[4] / reference
        print(f"target: 4 clients ≥ 0.9 × reference: {share:.2f} — {verdict(share >= 0.9)}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser()
    parser.add_argument("--seconds", type=float, default=10.0)
    parser.add_argument("--quick", action="store_true", help="1 and 4 clients, 1 s each")
    args = parser.parse_args()
    if args.quick:
        main(1.0, (1, 4))
    else:
        main(args.seconds, (1, 4, 16))
