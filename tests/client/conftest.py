"""A live service for the client and CLI tests: the real app over real HTTP, a real worker.

``live`` (one per test package run, to keep the suite fast) serves ``create_app`` with
werkzeug's threaded server on a free port and runs one ``likewise worker`` subprocess
on the same Redis, key prefix and queue; everything under that prefix is deleted before
and after. Tests share it and so each works in a metric of its own (``metric_name``).

``Proxy`` is a tiny TCP proxy in front of it that misbehaves once on purpose: it drops
the first connection after the service answered (the answer never reaches the client),
or answers the first request itself with a canned 503 or 429.
"""

from __future__ import annotations

import os
import secrets
import signal
import socket
import subprocess
import sys
import tempfile
import threading
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest
import redis
from werkzeug.serving import WSGIRequestHandler, make_server

from likewise_client import Client
from service.api import create_app
from service.config import Settings
from tests.conftest import ADMIN_TOKEN, _purge

ROOT = Path(__file__).resolve().parents[2]


class _Quiet(WSGIRequestHandler):
    def log_request(self, *args, **kwargs) -> None:  # one line per request: noise here
        pass


@dataclass
class Live:
    url: str
    token: str
    settings: Settings

    def client(self, **kwargs) -> Client:
        return Client(self.url, self.token, **kwargs)


@pytest.fixture(scope="package")
def live(redis_url: str) -> Iterator[Live]:
    prefix = f"lwt-{secrets.token_hex(5)}"
    settings = Settings(redis_url=redis_url, key_prefix=prefix, queue_name=f"{prefix}-fits",
                        admin_token=ADMIN_TOKEN, fit_timeout=120, fit_retries=1,
                        data_dir=tempfile.gettempdir())
    conn = redis.Redis.from_url(redis_url)
    _purge(conn, settings)
    server = make_server("127.0.0.1", 0, create_app(settings=settings), threaded=True,
                         request_handler=_Quiet)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    env = {**os.environ, "LIKEWISE_REDIS_URL": redis_url, "LIKEWISE_KEY_PREFIX": prefix,
           "LIKEWISE_QUEUE": settings.queue_name, "LIKEWISE_FIT_TIMEOUT": "120",
           "PYTHONPATH": str(ROOT)}
    log = tempfile.TemporaryFile()
    worker = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "worker", "--name", f"{prefix}-worker"],
        cwd=ROOT, env=env, stdout=log, stderr=subprocess.STDOUT)
    try:
        yield Live(f"http://127.0.0.1:{server.server_port}", ADMIN_TOKEN, settings)
    finally:
        worker.send_signal(signal.SIGTERM)
        try:
            worker.wait(timeout=30)
        except subprocess.TimeoutExpired:
            worker.kill()
            worker.wait(timeout=30)
        server.shutdown()
        thread.join(timeout=30)
        log.close()
        _purge(conn, settings)
        conn.close()


@pytest.fixture
def metric_name() -> str:
    return f"m-{secrets.token_hex(4)}"


def _read_request(conn: socket.socket) -> bytes:
    """One whole HTTP request (headers and a Content-Length body)."""
    data = b""
    while b"\r\n\r\n" not in data:
        chunk = conn.recv(65536)
        if not chunk:
            return data
        data += chunk
    head, _, body = data.partition(b"\r\n\r\n")
    length = 0
    for line in head.split(b"\r\n")[1:]:
        name, _, value = line.partition(b":")
        if name.strip().lower() == b"content-length":
            length = int(value.strip())
    while len(body) < length:
        chunk = conn.recv(65536)
        if not chunk:
            break
        body += chunk
    return head + b"\r\n\r\n" + body


def _pump(src: socket.socket, dst: socket.socket) -> None:
    try:
        while chunk := src.recv(65536):
            dst.sendall(chunk)
    except OSError:
        pass
    finally:
        for s in (src, dst):
            try:
                s.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass


class Proxy:
    """``Proxy(url, first)``: ``first`` is ``"drop"`` (forward the first request, wait
    for the service's answer, close the client's connection before any of it reaches
    the client) or an HTTP status (answer the first request with that problem, with
    ``Retry-After: 0``). Every later connection is passed through. ``requests`` counts
    the requests the proxy saw on the misbehaving connection and connections after it."""

    def __init__(self, url: str, first: str | int) -> None:
        host, port = url.removeprefix("http://").split(":")
        self.upstream = (host, int(port))
        self.first = first
        self.connections = 0
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.url = f"http://127.0.0.1:{self.listener.getsockname()[1]}"
        threading.Thread(target=self._serve, daemon=True).start()

    def _serve(self) -> None:
        while True:
            try:
                conn, _ = self.listener.accept()
            except OSError:
                return
            self.connections += 1
            target = self._misbehave if self.connections == 1 else self._through
            threading.Thread(target=target, args=(conn,), daemon=True).start()

    def _through(self, conn: socket.socket) -> None:
        up = socket.create_connection(self.upstream, timeout=60)
        threading.Thread(target=_pump, args=(conn, up), daemon=True).start()
        _pump(up, conn)

    def _misbehave(self, conn: socket.socket) -> None:
        with conn:
            request = _read_request(conn)
            if self.first == "drop":
                with socket.create_connection(self.upstream, timeout=60) as up:
                    up.sendall(request)
                    up.recv(1)  # the service has answered: it handled the request
                return  # closing now, so the client never sees the answer
            body = (b'{"type":"urn:likewise:problem:unavailable","title":"busy",'
                    b'"status":%d,"detail":"try again","instance":"/"}' % self.first)
            conn.sendall(b"HTTP/1.1 %d Busy\r\nContent-Type: application/problem+json\r\n"
                         b"Retry-After: 0\r\nConnection: close\r\nContent-Length: %d\r\n\r\n"
                         % (self.first, len(body)) + body)

    def close(self) -> None:
        self.listener.close()


@pytest.fixture
def proxy(live: Live) -> Iterator[type[Proxy]]:
    made: list[Proxy] = []

    def make(first: str | int) -> Proxy:
        made.append(Proxy(live.url, first))
        return made[-1]

    yield make  # type: ignore[misc]
    for p in made:
        p.close()
