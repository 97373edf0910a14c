"""End to end: ``likewise run`` (real gunicorn, real worker processes, real Redis) over HTTP.

Data: scikit-learn's bundled UCI optical digits (Alpaydin & Kaynak) — labelled batches
of 2–5 digit classes from a fitting pool, held-out batches from a disjoint pool.
Agreement is the adjusted Rand index (Hubert & Arabie 1985) from ``sklearn.metrics``.
"""

from __future__ import annotations

import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import redis
from sklearn.cluster import KMeans
from sklearn.metrics import adjusted_rand_score

from likewise_client import NO_RETRY, Client, Unreachable
from tests.datasets import load_open, make_batches, split_pool

START_TIMEOUT = 60.0
FIT_TIMEOUT = 240.0
TOKEN = "e2e-admin-token"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _ready(base: str) -> bool:
    """/readyz answers 200 (asked once; not serving yet is not an error here)."""
    try:
        with Client(base, retry=NO_RETRY) as anon:
            return anon.ready()[0]
    except Unreachable:
        return False


def _wait(predicate, timeout: float, what: str, proc: subprocess.Popen | None = None):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        if proc is not None and proc.poll() is not None:
            raise AssertionError(f"launcher exited ({proc.returncode}) while waiting for {what}")
        time.sleep(0.2)
    raise AssertionError(f"timed out after {timeout}s waiting for {what}")


def _start(
    env: dict, tmp: Path, data_dir: Path | None = None
) -> tuple[subprocess.Popen, str]:
    """Start ``likewise run``; return the process and its base URL once /readyz says ready."""
    port = _free_port()
    full = {**os.environ, **env, "LIKEWISE_PORT": str(port),
            "LIKEWISE_DATA_DIR": str(data_dir or tmp)}
    log = open(tmp / "launcher.log", "ab")  # noqa: SIM115 - lives as long as the process
    proc = subprocess.Popen([sys.executable, "-m", "service.cli", "run"], env=full,
                            stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    base = f"http://127.0.0.1:{port}"
    _wait(lambda: _ready(base), START_TIMEOUT, "/readyz", proc)
    return proc, base


def launcher_env(settings, admin_token: str = TOKEN) -> dict[str, str]:
    """Environment for ``likewise run`` on this test's Redis, key prefix and queue."""
    return {
        "LIKEWISE_REDIS_URL": settings.redis_url,
        "LIKEWISE_KEY_PREFIX": settings.key_prefix,
        "LIKEWISE_QUEUE": settings.queue_name,
        "LIKEWISE_ADMIN_TOKEN": admin_token,
        "LIKEWISE_WORKERS": "1",
    }


def _stop(proc: subprocess.Popen) -> int:
    if proc.poll() is None:
        proc.send_signal(signal.SIGINT)  # what Ctrl-C sends
    try:
        return proc.wait(timeout=30)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        raise


def _children_gone(pid: int) -> bool:
    out = subprocess.run(["ps", "-ww", "-o", "pid=", "--ppid", str(pid)],
                         capture_output=True, text=True)
    return out.stdout.strip() == ""


def _chunked_put(base: str, path: str, raw: bytes) -> tuple[int, dict]:
    """PUT ``raw`` with ``Transfer-Encoding: chunked`` (64 KiB chunks)."""
    import http.client
    from urllib.parse import urlsplit

    url = urlsplit(base)
    conn = http.client.HTTPConnection(url.hostname, url.port, timeout=30)
    try:
        chunks = (raw[i:i + 65536] for i in range(0, len(raw), 65536))
        conn.request("PUT", path, body=chunks, encode_chunked=True,
                     headers={"Authorization": f"Bearer {TOKEN}",
                              "Content-Type": "application/json"})
        resp = conn.getresponse()
        assert resp.getheader("Content-Type") == "application/problem+json"
        return resp.status, json.loads(resp.read())
    finally:
        conn.close()


def _raw_get(base: str, path: str, headers: dict[str, str]) -> tuple[int, dict]:
    import http.client
    from urllib.parse import urlsplit

    url = urlsplit(base)
    conn = http.client.HTTPConnection(url.hostname, url.port, timeout=30)
    try:
        conn.request("GET", path, headers={"Authorization": f"Bearer {TOKEN}", **headers})
        resp = conn.getresponse()
        assert resp.getheader("Content-Type") == "application/problem+json"
        return resp.status, json.loads(resp.read())
    finally:
        conn.close()


def _fit(http: Client, name: str, body: dict) -> dict:
    status, fit, headers = http.request("POST", f"/v1/metrics/{name}/fits", body)
    assert status == 202, fit
    assert headers.get("Location") == f"/v1/fits/{fit['fit_id']}"
    result = http.wait_for_fit(fit["fit_id"], timeout=FIT_TIMEOUT, interval=0.2)
    assert result["status"] == "succeeded", result
    return result


def _post_batch(http: Client, name: str, features: list[str], X: np.ndarray, y: np.ndarray):
    return http.post_batch(name, X, y, columns=features)  # raises unless 201


def _drift_buckets(settings) -> list[bytes]:
    """The drift buckets of the flow's metric in Redis (read there, not through a
    request: a request would release what its process still holds)."""
    from service.context import Context

    ctx = Context.build(settings)
    try:
        return list(ctx.redis.scan_iter(match=ctx.storage.keys.metric("digits", "drift", "")
                                        + "*"))
    finally:
        ctx.close()


@pytest.mark.timeout(600)
def test_whole_flow_through_the_launcher(settings, tmp_path):
    proc, base = _start(launcher_env(settings), tmp_path)
    http = Client(base, TOKEN)
    try:
        rng = np.random.default_rng(2026)
        X, y = load_open("digits")
        (Xf, yf), (Xs, ys) = split_pool(X, y, rng)
        features = [f"px{i}" for i in range(X.shape[1])]
        train = make_batches(Xf, yf, 26, rng)
        held_out = make_batches(Xs, ys, 4, rng, classes_per_batch=(3, 5))

        assert http.request("PUT", "/v1/metrics/digits", {"features": features})[0] == 201
        for Xb, yb in train[:20]:
            _post_batch(http, "digits", features, Xb, yb)

        first = _fit(http, "digits", {})
        assert first["version"] == 1
        status, metric, _ = http.request("GET", "/v1/metrics/digits")
        assert status == 200 and metric["active_version"] == 1 and metric["batches"] == 20

        # held-out batches from the disjoint pool: the learned metric beats Euclidean
        # k-means (the reference: scikit-learn KMeans on each standardised batch)
        learned, euclidean = [], []
        for i, (Xh, yh) in enumerate(held_out):
            k = len(np.unique(yh))
            status, out, _ = http.request("POST", "/v1/metrics/digits/groupings",
                                  {"columns": features, "rows": Xh.tolist(), "k": k})
            assert status == 200 and out["version"] == 1, out
            if i == 0:  # before any other request: the server's close of the answer
                _wait(lambda: _drift_buckets(settings), 15.0, "the first drift summary")
            learned.append(adjusted_rand_score(yh, out["labels"]))
            spread = Xh.std(axis=0)
            Zh = (Xh - Xh.mean(axis=0)) / np.where(spread > 0, spread, 1.0)
            km = KMeans(k, n_init=10, random_state=0).fit_predict(Zh)
            euclidean.append(adjusted_rand_score(yh, km))
        assert np.mean(learned) > np.mean(euclidean), (learned, euclidean)

        for Xb, yb in train[20:]:
            _post_batch(http, "digits", features, Xb, yb)
        second = _fit(http, "digits", {"activate": "at_once"})
        assert second["version"] == 2
        assert http.request("GET", "/v1/metrics/digits")[1]["active_version"] == 2

        # roll back to version 1
        status, body, _ = http.request("PUT", "/v1/metrics/digits/active",
                               {"version": 1, "reason": "e2e roll back"})
        assert status == 200, body
        Xh, yh = held_out[0]
        status, out, _ = http.request("POST", "/v1/metrics/digits/groupings",
                              {"columns": features, "rows": Xh.tolist(),
                               "k": len(np.unique(yh))})
        assert status == 200 and out["version"] == 1

        history = http.request("GET", "/v1/metrics/digits/history")[1]["history"]
        moves = [(h["from"], h["to"]) for h in history]
        assert moves == [(None, 1), (1, 2), (2, 1)]
        rollback = history[-1]
        assert rollback["who"] == "admin" and rollback["reason"] == "e2e roll back"

        # a chunked body (no Content-Length) over the route's limit is a 413 problem,
        # from the real HTTP server, not a parse error of a silently cut body
        over = b'{"features": ["' + b"x" * (1024 * 1024) + b'"]}'  # just over 1 MiB
        status, problem = _chunked_put(base, "/v1/metrics/wide", over)
        assert status == 413 and problem["status"] == 413, problem

        # what the HTTP server refuses before the app is problem+json too
        status, problem = _raw_get(base, "/v1/metrics/" + "x" * 5000, {})
        assert status == 414 and problem["status"] == 414, problem
        status, problem = _raw_get(base, "/v1/metrics", {"X-Big": "y" * 9000})
        assert status in (400, 431) and problem["status"] == status, problem

        status, queues, _ = http.request("GET", "/v1/queues")
        assert status == 200
        assert any(w["state"] for w in queues["workers"])
    finally:
        assert _stop(proc) == 0
    assert _children_gone(proc.pid)


@pytest.mark.timeout(300)
def test_embedded_redis_token_file_and_persistence(tmp_path):
    """``make run`` on a fresh machine: no Redis URL, no token — both are provided."""
    env = {"LIKEWISE_WORKERS": "1", "LIKEWISE_STRANDED_SECONDS": "3"}
    for key in ("LIKEWISE_REDIS_URL", "LIKEWISE_ADMIN_TOKEN", "LIKEWISE_KEY_PREFIX",
                "LIKEWISE_QUEUE"):
        env[key] = ""
    proc, base = _start(env, tmp_path)
    token_file = tmp_path / "admin-token"
    try:
        assert token_file.stat().st_mode & 0o777 == 0o600
        http = Client(base, token_file.read_text().strip())
        assert http.request("GET", "/v1/metrics")[0] == 200
        assert Client(base, "wrong").request("GET", "/v1/metrics")[0] == 401
        assert http.request("PUT", "/v1/metrics/kept", {"features": ["a", "b"]})[0] == 201
        # the embedded Redis wants its generated password, and its files are private:
        # the append-only file holds the raw batches
        redis_dir = tmp_path / "redis"
        assert redis_dir.stat().st_mode & 0o777 == 0o700
        password = (redis_dir / "password").read_text().strip()
        assert password and (redis_dir / "password").stat().st_mode & 0o777 == 0o600
        port = _embedded_port(tmp_path / "launcher.log")
        assert password not in (tmp_path / "launcher.log").read_text()
        with pytest.raises(redis.AuthenticationError):
            redis.Redis(port=port, socket_timeout=5).ping()
        assert redis.Redis(port=port, password=password, socket_timeout=5).ping()
        files = [f for f in redis_dir.rglob("*") if f.is_file()]
        assert any("appendonly" in f.name for f in files)
        for item in redis_dir.rglob("*"):
            assert item.stat().st_mode & 0o777 == (0o700 if item.is_dir() else 0o600), item
        # the embedded Redis crashes just after a fit was queued: the launcher starts it
        # again on the same data, every write it acknowledged is still there, and the
        # fit completes (whichever step the crash cut: taken, running or not yet seen)
        X, y = load_open("iris")
        feats = ["sl", "sw", "pl", "pw"]
        http.put_metric("iris", feats)
        for Xb, yb in make_batches(X, y, 2, np.random.default_rng(0)):
            _post_batch(http, "iris", feats, Xb, yb)
        # the server names its own pid (a process listing may cut or retitle its command)
        served = redis.Redis(port=port, password=password, socket_timeout=5)
        redis_pid = int(served.info("server")["process_id"])
        fit_id = http.start_fit("iris")["fit_id"]
        os.kill(redis_pid, signal.SIGKILL)
        _wait(lambda: http.request("GET", "/v1/metrics/kept")[0] == 200, 30, "Redis back", proc)
        assert proc.poll() is None
        assert "redis exited with code -9; started it again" in (
            tmp_path / "launcher.log").read_text()
        assert http.request("GET", "/v1/metrics/kept")[1]["features"] == ["a", "b"]
        done = http.wait_for_fit(fit_id, timeout=FIT_TIMEOUT, interval=0.5)
        assert done["status"] == "succeeded", done
    finally:
        assert _stop(proc) == 0
    # a second start reuses the token and finds the metric: the append-only file kept it
    proc2, base2 = _start(env, tmp_path)
    try:
        http = Client(base2, token_file.read_text().strip())
        status, body, _ = http.request("GET", "/v1/metrics/kept")
        assert status == 200 and body["features"] == ["a", "b"]
    finally:
        assert _stop(proc2) == 0


def _embedded_port(log: Path) -> int:
    """The port of the embedded Redis, from the launcher's start line (which masks the
    password: the line is checked for that too)."""
    text = log.read_text()
    found = re.findall(r"embedded Redis at redis://:\*\*\*@127\.0\.0\.1:(\d+)/0", text)
    assert found, text[-2000:]
    return int(found[-1])


def _worker_pids(launcher_pid: int) -> set[int]:
    out = subprocess.run(["ps", "-ww", "-o", "pid=,args=", "--ppid", str(launcher_pid)],
                         capture_output=True, text=True)
    return {int(line.split()[0]) for line in out.stdout.splitlines()
            if "service.cli worker" in line}


@pytest.mark.timeout(300)
def test_a_killed_fit_worker_is_started_again(settings, tmp_path):
    proc, base = _start(launcher_env(settings), tmp_path)
    http = Client(base, TOKEN)

    def worker_names() -> set[str]:
        status, queues, _ = http.request("GET", "/v1/queues")
        assert status == 200
        return {w["name"] for w in queues["workers"]}

    try:
        (old,) = _wait(lambda: _worker_pids(proc.pid), 30, "a worker process", proc)
        before = _wait(worker_names, 30, "a registered worker", proc)
        os.kill(old, signal.SIGKILL)
        new = _wait(lambda: _worker_pids(proc.pid) - {old}, 30, "a new worker process", proc)
        assert old not in new and proc.poll() is None
        # the replacement registers under a fresh name (the killed one may linger until
        # its registration expires)
        _wait(lambda: worker_names() - before, 30, "the new worker to register", proc)
        assert http.request("GET", "/readyz")[0] == 200
    finally:
        assert _stop(proc) == 0
    assert _children_gone(proc.pid)


@pytest.mark.timeout(300)
def test_sigterm_during_a_fit_then_a_new_start_finishes_it(settings, tmp_path):
    """``likewise run`` is stopped (SIGTERM) while a fit runs; after a new start the fit
    ends — succeeded, or failed with a reason — and is never left running."""
    env = launcher_env(settings)
    proc, base = _start(env, tmp_path)
    http = Client(base, TOKEN)
    rng = np.random.default_rng(7)
    X, y = load_open("digits")
    features = [f"px{i}" for i in range(X.shape[1])]
    assert http.request("PUT", "/v1/metrics/digits", {"features": features})[0] == 201
    for Xb, yb in make_batches(X, y, 24, rng):
        _post_batch(http, "digits", features, Xb, yb)
    # a deliberately long fit: every learner over many α and folds
    alphas = [10.0 ** e for e in np.linspace(-4, 3, 32)]
    status, fit, _ = http.request("POST", "/v1/metrics/digits/fits",
                          {"alphas": alphas, "n_folds": 20, "k_max": 20})
    assert status == 202, fit
    try:
        _wait(lambda: http.request("GET", f"/v1/fits/{fit['fit_id']}")[1]["status"] == "running",
              60, "the fit to start", proc)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=60) == 0
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
    assert _children_gone(proc.pid)
    proc2, base2 = _start(env, tmp_path)
    try:
        http2 = Client(base2, TOKEN)

        def ended():
            body = http2.request("GET", f"/v1/fits/{fit['fit_id']}")[1]
            return body if body["status"] in ("succeeded", "failed") else None

        out = _wait(ended, 120, "the interrupted fit to end", proc2)
        assert out["status"] == "succeeded" or out["error"], out
    finally:
        assert _stop(proc2) == 0


@pytest.mark.timeout(300)
def test_two_worst_case_bodies_leave_healthz_answering(settings, tmp_path):
    """Two bodies at the size limit, each as costly to parse as JSON gets (millions of
    tiny numbers), posted at once: /healthz keeps answering within 1 s throughout.
    (A stall check with the issue's bound, not a speed claim: JSON parsing holds its
    process's GIL, and the default of one web process more than cores leaves one free.)"""
    import http.client
    import threading
    from urllib.parse import urlsplit

    limit = 16 * 1024 * 1024
    env = {**launcher_env(settings), "LIKEWISE_MAX_REQUEST_BYTES": str(limit)}
    env.pop("LIKEWISE_WEB_WORKERS", None)  # the default: cores + 1
    proc, base = _start(env, tmp_path)
    http_ = Client(base, TOKEN)
    try:
        http_.put_metric("wide", ["a", "b", "c", "d"])
        row = b"[0,0,0,0],"
        body = b'{"rows": [' + row * ((limit - 64) // len(row)) + b'[0,0,0,0]], ' \
               b'"columns": ["a","b","c","d"], "groups": [0]}'
        assert len(body) <= limit
        answers: list[int] = []

        def post() -> None:
            url = urlsplit(base)
            conn = http.client.HTTPConnection(url.hostname, url.port, timeout=120)
            try:
                conn.request("POST", "/v1/metrics/wide/batches", body=body,
                             headers={"Authorization": f"Bearer {TOKEN}",
                                      "Content-Type": "application/json"})
                answers.append(conn.getresponse().status)
            finally:
                conn.close()

        posters = [threading.Thread(target=post) for _ in range(2)]
        for t in posters:
            t.start()
        slowest, probes = 0.0, 0
        url = urlsplit(base)
        while any(t.is_alive() for t in posters):
            started = time.monotonic()
            # a new connection per probe, as an orchestrator's probe makes (a kept-alive
            # one stays with the process it first reached)
            probe = http.client.HTTPConnection(url.hostname, url.port, timeout=30)
            try:
                probe.request("GET", "/healthz")
                assert probe.getresponse().status == 200
            finally:
                probe.close()
            slowest = max(slowest, time.monotonic() - started)
            probes += 1
        for t in posters:
            t.join(timeout=120)
        # refused as too many records / labels, never a 500 or a stall
        assert len(answers) == 2 and all(400 <= a < 500 for a in answers), answers
        assert probes > 1 and slowest < 1.0, (probes, slowest)
    finally:
        http_.close()
        assert _stop(proc) == 0
