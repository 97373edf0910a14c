"""Grouping throughput of a live ``likewise run`` at 1, 4 and 16 clients.

The launcher starts gunicorn (default web processes: cores + 1) and one fit worker on
a real Redis; a metric is fitted on digits batches (UCI optical digits, scikit-learn's
copy; the 20 most varied pixels). Each client is a thread with its own connection
posting 1,000-record groupings (JSON, k = 5) for a fixed time. Reference, in the same
run: ``group_records`` on the same matrix in this process, its rate × cores.
Target (issue 9): with 4 clients, ≥ 90 % of that reference.

The reference assumes every core runs k-means and nothing else, while the clients
run on the same machine and a request costs the server more than its k-means. So
each level also reports where the machine's CPU went (Linux ``/proc``): the client
threads' own CPU per request (``time.thread_time`` in each thread), the service's
(the launcher's process tree: web processes, their helpers, the fit worker), the
Redis server's (its ``INFO cpu``; a shared server's other users included) and the
rest of the machine's (other programs). "Left to server" is the share of
``cores × seconds`` that neither the clients nor other programs took. The in-process
API cost is a grouping through the app in this process (Flask test client, the
drift write included) over ``group_records`` alone, CPU seconds, medians of
interleaved turns. The ceiling, as a multiple of the reference, is what a server
that spent exactly that per request could reach with the CPU left to it:
``left to server / API cost``, times ``clients / cores`` when there are fewer clients
than cores (a client waits for each answer, so it keeps at most one core busy);
"of ceiling" is the measured rate over it.

Beside the reference, ``group_records`` in ``cores`` processes at once (each for the
level's seconds, started together) shows how far this machine's cores scale when all
of them work: a core may run k-means slower while the others are busy too, and other
programs take their share as well ("× all cores" is a level's rate over that one).

    .venv/bin/python bench/throughput.py [--seconds S] [--quick]
"""

from __future__ import annotations

import argparse
import http.client
import json
import multiprocessing
import os
import secrets
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402
import redis  # noqa: E402

from bench._redis import clean_up, redis_url, verdict  # noqa: E402
from likewise_client import Client  # noqa: E402
from service.api import create_app  # noqa: E402
from service.config import Settings  # noqa: E402
from service.context import Context  # noqa: E402
from service.core import FittedMetric, group_records  # noqa: E402
from service.usecases.backlog import BACKLOG  # noqa: E402
from tests.datasets import load_open, make_batches  # noqa: E402

TOKEN = "bench-token"
N, K = 1000, 5


def _port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


_TICK = os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 100


def _process_cpu(pid: int) -> float:
    """CPU seconds of one process (every thread), 0 once it is gone."""
    try:
        with open(f"/proc/{pid}/stat") as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / _TICK  # utime, stime


def _tree(pid: int) -> list[int]:
    """``pid`` and every process below it."""
    found, todo = [], [pid]
    while todo:
        p = todo.pop()
        found.append(p)
        try:
            for task in os.listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{task}/children") as fh:
                    todo.extend(int(c) for c in fh.read().split())
        except OSError:
            continue
    return found


def _machine_busy() -> float:
    """CPU seconds the whole machine spent busy since boot (all cores)."""
    with open("/proc/stat") as fh:
        ticks = [int(v) for v in fh.readline().split()[1:9]]
    return (sum(ticks) - ticks[3] - ticks[4]) / _TICK  # less idle and iowait


def _redis_cpu(conn) -> float:  # noqa: ANN001 — a redis.Redis
    info = conn.info("cpu")
    return float(info["used_cpu_user"]) + float(info["used_cpu_sys"])


class Level:
    """One level's rate and where the machine's CPU went, per request."""

    def __init__(self, clients: int, requests: int, seconds: float, client_cpu: float,
                 service_cpu: float | None, redis_cpu: float, busy: float | None,
                 cores: int) -> None:
        self.clients, self.rate = clients, requests / seconds
        per = 1000 / max(requests, 1)
        self.client_ms, self.redis_ms = client_cpu * per, redis_cpu * per
        self.service_ms = service_cpu * per if service_cpu is not None else None
        self.available_ms = cores * seconds * per
        self.others_ms = None
        if busy is not None and service_cpu is not None:
            self.others_ms = max(0.0, busy * per - self.client_ms - self.service_ms
                                 - self.redis_ms)

    @property
    def left(self) -> float | None:
        """Share of the machine that neither the clients nor other programs took."""
        if self.others_ms is None:
            return None
        return max(0.0, 1 - (self.client_ms + self.others_ms) / self.available_ms)


def _clients(host: str, port: int, body: bytes, clients: int, seconds: float,
             service: int, redis_conn, cores: int) -> Level:  # noqa: ANN001
    done = [0] * clients
    cpu = [0.0] * clients
    stop = time.monotonic() + seconds
    headers = {"Authorization": f"Bearer {TOKEN}", "Content-Type": "application/json"}

    def run(i: int) -> None:
        started = time.thread_time()
        conn = http.client.HTTPConnection(host, port, timeout=60)
        while time.monotonic() < stop:
            conn.request("POST", "/v1/metrics/bench/groupings", body=body, headers=headers)
            resp = conn.getresponse()
            resp.read()
            if resp.status != 200:
                raise SystemExit(f"grouping answered {resp.status}")
            done[i] += 1
        conn.close()
        cpu[i] = time.thread_time() - started

    threads = [threading.Thread(target=run, args=(i,)) for i in range(clients)]
    linux = os.path.exists("/proc/stat")
    pids = _tree(service) if linux else []
    before = {p: _process_cpu(p) for p in pids}
    busy, redis_before = _machine_busy() if linux else 0.0, _redis_cpu(redis_conn)
    started = time.monotonic()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    elapsed = time.monotonic() - started
    redis_cpu = _redis_cpu(redis_conn) - redis_before
    service_cpu = busy_cpu = None
    if linux:
        busy_cpu = _machine_busy() - busy
        pids = set(pids) | set(_tree(service))  # helpers started meanwhile count from 0
        service_cpu = sum(_process_cpu(p) - before.get(p, 0.0) for p in pids)
    return Level(clients, sum(done), elapsed, sum(cpu), service_cpu, redis_cpu, busy_cpu,
                 cores)


def _loop(fitted: FittedMetric, Xn: np.ndarray, start: float, seconds: float) -> int:
    """``group_records`` calls from wall-clock ``start`` for ``seconds`` (in a child)."""
    time.sleep(max(0.0, start - time.time()))
    calls = 0
    while time.time() - start < seconds:
        group_records(fitted, Xn, k=K)
        calls += 1
    return calls


def _all_cores(fitted: FittedMetric, Xn: np.ndarray, cores: int, seconds: float) -> float:
    """Calls a second of ``group_records`` in ``cores`` fresh processes at once."""
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(cores, mp_context=multiprocessing.get_context("spawn")) as pool:
        list(pool.map(int, range(cores)))  # started and imported before the clock runs
        start = time.time() + 2.0
        counts = list(pool.map(_loop, [fitted] * cores, [Xn] * cores, [start] * cores,
                               [seconds] * cores))
    return sum(counts) / seconds


def _api_cost(url: str, prefix: str, fitted: FittedMetric, Xn: np.ndarray, body: bytes,
              turns: int) -> tuple[float, float]:
    """(group_records CPU seconds, the in-process API's CPU over it), medians of
    interleaved turns: a grouping through the app in this process, its drift write
    (the backlog's thread) included."""
    ctx = Context.build(Settings(redis_url=url, key_prefix=prefix, admin_token=TOKEN))
    client = create_app(context=ctx).test_client()
    headers = {"Authorization": f"Bearer {TOKEN}"}

    def api() -> None:
        resp = client.post("/v1/metrics/bench/groupings", data=body,
                           content_type="application/json", headers=headers)
        if resp.status_code != 200:
            raise SystemExit(f"grouping in process answered {resp.status_code}")
        BACKLOG.flush()

    api()  # the version cache and the drift reference
    ref, through = [], []
    for _ in range(turns):
        started = time.process_time()
        group_records(fitted, Xn, k=K)
        ref.append(time.process_time() - started)
        started = time.process_time()
        api()
        through.append(time.process_time() - started)
    one = statistics.median(ref)
    return one, statistics.median(through) / one


def _parse_cpu(body: bytes, turns: int) -> float:
    """CPU seconds of the body's bare parse into a matrix (the service's inline
    simdjson path, ``service.api.jsonio.number_rows``), median of ``turns``."""
    from service.api.jsonio import number_rows

    times = []
    for _ in range(turns):
        started = time.process_time()
        number_rows(body)
        times.append(time.process_time() - started)
    return statistics.median(times)


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
        together = _all_cores(fitted, Xn, cores, seconds)
        one_cpu, api_cost = _api_cost(url, prefix, fitted, Xn, body,
                                      10 if seconds < 2 else 40)
        parse_cpu = _parse_cpu(body, 10 if seconds < 2 else 40)
        redis_conn = redis.Redis.from_url(url)
        rates = {c: _clients("127.0.0.1", port, body, c, seconds, proc.pid, redis_conn, cores)
                 for c in levels}
        lw.close()
    finally:
        proc.terminate()
        proc.wait(timeout=60)
        clean_up(redis.Redis.from_url(url), prefix, server)
    print(f"Grouping throughput, {N:,} × 20 records per request, k = {K}, {seconds:.0f} s "
          f"per level (load average {os.getloadavg()[0]:.2f}; web processes: cores + 1)")
    print(f"reference: group_records in process × {cores} cores = {reference:.1f} requests/s "
          f"({one_cpu * 1000:.2f} ms CPU a call)")
    print(f"group_records in {cores} processes at once: {together:.1f} requests/s "
          f"({together / reference:.2f} × reference)")
    print(f"in-process API cost: {api_cost:.2f} × group_records (CPU, drift write included)")
    print("CPU per request, ms: clients (the bench's threads), service (web processes, "
          "helpers, worker), Redis, others (the rest of the machine)")

    def ms(v: float | None) -> str:
        return f"{v:.2f}" if v is not None else "—"

    def ratio(v: float | None) -> str:
        return f"{v:.2f}" if v is not None else "—"

    print(f"{'clients':>8} {'requests/s':>11} {'× reference':>12} {'× all cores':>12} "
          f"{'clients':>8} "
          f"{'service':>8} {'Redis':>6} {'others':>7} {'service/ref':>12} "
          f"{'left to server':>15} {'ceiling ×ref':>13} {'of ceiling':>11}")
    for c, lv in rates.items():
        left = lv.left
        ceiling = (left / api_cost * min(c, cores) / cores) if left is not None else None
        print(f"{c:>8} {lv.rate:>11.1f} {lv.rate / reference:>12.2f} "
              f"{lv.rate / together:>12.2f} {ms(lv.client_ms):>8} "
              f"{ms(lv.service_ms):>8} {ms(lv.redis_ms):>6} {ms(lv.others_ms):>7} "
              f"{ratio(lv.service_ms / (one_cpu * 1000) if lv.service_ms else None):>12} "
              f"{f'{left:.0%}' if left is not None else '—':>15} {ratio(ceiling):>13} "
              f"{ratio(lv.rate / reference / ceiling if ceiling else None):>11}")
    if 4 in rates:
        share = rates[4].rate / reference
        # what no server could beat on this machine: each request costs at least its
        # k-means, its body's bare parse and the client's own CPU, on the same cores
        floor = one_cpu + parse_cpu + rates[4].client_ms / 1000
        print(f"best any server could reach here at 4 clients: group_records "
              f"{one_cpu * 1000:.2f} ms + bare parse {parse_cpu * 1000:.2f} ms + the "
              f"clients' own {rates[4].client_ms:.2f} ms CPU a request = "
              f"{one_cpu / floor:.2f} × reference (no HTTP, routing, Redis or answer)")
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
