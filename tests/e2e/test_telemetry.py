"""Telemetry through ``likewise run`` with two web processes (real gunicorn, real worker).

A scrape is answered by whichever web process accepts it: every scrape must give the
same totals, and the series read from Redis must match what the API says about fits.
Data: scikit-learn's bundled iris (Fisher 1936).
"""

from __future__ import annotations

import json
import subprocess
import urllib.request
from pathlib import Path

import pytest
from prometheus_client.parser import text_string_to_metric_families

from likewise_client import Client
from tests.api.helpers import iris_batches, records_body
from tests.e2e.test_flow import TOKEN, _fit, _start, _stop, launcher_env
from tests.service.test_worker_words import RQ_SENTENCES

N_REQUESTS = 40
MAX_REQUESTS = 1000
SCRAPES = 6


def _writers(folder: Path) -> set[int]:
    """The pids whose counter files are in the samples folder."""
    return {int(f.stem.rsplit("_", 1)[1]) for f in folder.glob("counter_*.db")}


def _samples(base: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    import urllib.request

    with urllib.request.urlopen(base + "/metrics", timeout=30) as resp:
        text = resp.read().decode()
    out = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def _probe(base: str) -> int:
    """GET /healthz on a new connection (a kept-alive one stays with one process)."""
    with urllib.request.urlopen(base + "/healthz", timeout=30) as resp:
        return resp.status


def _web_processes(launcher_pid: int) -> tuple[Path, set[int]]:
    """The samples folder of the gunicorn master under the launcher, and its web
    processes' pids."""
    out = subprocess.run(["ps", "-ww", "-o", "pid=,args=", "--ppid", str(launcher_pid)],
                         capture_output=True, text=True, check=True).stdout
    master = next(int(line.split()[0]) for line in out.splitlines() if "gunicorn" in line)
    environ = Path(f"/proc/{master}/environ").read_bytes().split(b"\0")
    folder = next(e.split(b"=", 1)[1].decode() for e in environ
                  if e.startswith(b"PROMETHEUS_MULTIPROC_DIR="))
    kids = subprocess.run(["ps", "-o", "pid=", "--ppid", str(master)],
                          capture_output=True, text=True, check=True).stdout.split()
    return Path(folder), {int(p) for p in kids}


@pytest.mark.timeout(300)
def test_metrics_add_up_across_two_web_processes(settings, tmp_path):
    env = {**launcher_env(settings), "LIKEWISE_WEB_WORKERS": "2"}
    proc, base = _start(env, tmp_path)
    http = Client(base, TOKEN)
    try:
        folder, pids = _web_processes(proc.pid)
        assert len(pids) == 2
        assert oct(folder.stat().st_mode & 0o777) == "0o700"

        # requests until both processes have served some (each writes its own files)
        made = 0
        while made < N_REQUESTS or _writers(folder) != pids:
            assert made < MAX_REQUESTS, f"one process served all {made} requests"
            assert _probe(base) == 200
            made += 1
        totals = set()
        for _ in range(SCRAPES):
            s = _samples(base)
            totals.add(sum(v for (name, labels), v in s.items()
                           if name == "likewise_http_requests_total"
                           and ("route", "/healthz") in labels))
        assert totals == {made}

        # a fit, a grouping and an operator's activation, then the Redis-read series
        assert http.request("PUT", "/v1/metrics/iris",
                    {"features": ["sepal_length", "sepal_width", "petal_length",
                                  "petal_width"]})[0] == 201
        batches = iris_batches(6)
        for X, labels in batches:
            answer = http.request("POST", "/v1/metrics/iris/batches", records_body(X, labels))
            assert answer[0] == 201
        fit = _fit(http, "iris", {})
        X, labels = batches[0]
        body = {"records": records_body(X, labels)["records"], "k": 3}
        assert http.request("POST", "/v1/metrics/iris/groupings", body)[0] == 200
        assert http.request("PUT", "/v1/metrics/iris/active",
                    {"version": 1, "reason": "telemetry check"})[0] == 200

        fits = http.request("GET", "/v1/fits?metric=iris")[1]["fits"]
        by_outcome = {o: sum(f["status"] == o for f in fits) for o in ("succeeded", "failed")}
        history = http.request("GET", "/v1/metrics/iris/history")[1]["history"]
        seen = []
        for _ in range(SCRAPES):
            s = _samples(base)
            seen.append((
                {o: s[("likewise_fits_ended_total", (("outcome", o),))] for o in by_outcome},
                {o: s[("likewise_fit_run_seconds_count", (("outcome", o),))]
                 for o in by_outcome},
                s[("likewise_versions_activated_total", (("by", "fit"),))]
                + s[("likewise_versions_activated_total", (("by", "operator"),))],
                s[("likewise_fit_queue_depth", (("state", "waiting"),))],
                s[("likewise_grouping_records_count", ())],
                s[("likewise_grouping_records_sum", ())],
                s[("likewise_store_up", ())],
            ))
        assert seen == [(by_outcome, by_outcome, len(history), 0, 1, len(X), 1)] * SCRAPES
        assert by_outcome == {"succeeded": 1, "failed": 0}

        req = urllib.request.Request(base + "/v1/metrics/iris",
                                     headers={"Authorization": f"Bearer {TOKEN}",
                                              "X-Request-Id": "e2e-telemetry-1"})
        with urllib.request.urlopen(req, timeout=30) as resp:
            assert resp.headers["X-Request-Id"] == "e2e-telemetry-1"
    finally:
        assert _stop(proc) == 0
    assert not folder.exists()  # the launcher removes the samples folder

    # every line of the launcher, gunicorn, the app and the worker is one JSON object
    text = (tmp_path / "launcher.log").read_text()
    lines = [json.loads(line) for line in text.splitlines()]
    assert all({"time", "level", "logger", "message"} <= set(line) for line in lines)
    (mine,) = [line for line in lines if line.get("request_id") == "e2e-telemetry-1"]
    assert (mine["logger"], mine["route"], mine["status"], mine["metric"]) == (
        "likewise.http", "/v1/metrics/<name>", 200, "iris")
    assert mine["duration_ms"] >= 0 and mine["principal"] == "admin"
    fit_lines = [line for line in lines if line.get("fit_id") == fit["fit_id"]]
    assert {line["logger"] for line in fit_lines} >= {"likewise.http", "likewise.worker"}
    assert TOKEN not in text
    for sentence in RQ_SENTENCES:
        assert sentence not in text
