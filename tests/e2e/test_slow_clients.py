"""Clients that stall, trickle or stop reading cannot hold the web processes of a
``likewise run`` (real gunicorn, real Redis): every exchange has a deadline
(``service/deadlines.py``).

Two web processes; a head is due within 3 s (``LIKEWISE_CLIENT_SECONDS``), a body or
an answer within that plus its length at 10,000,000 bytes a second. Without the
deadlines, each scenario below held both processes until the clients gave up.
Data: scikit-learn's bundled iris (Fisher 1936), and Gaussian records with long ids
for the grouping whose answer (about 22 MB) is far more than the socket buffers hold.
"""

from __future__ import annotations

import json
import socket
import time
import urllib.request
from urllib.parse import urlsplit

import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families

from likewise_client import Client
from tests.api.helpers import IRIS_FEATURES, iris_batches, records_body
from tests.e2e.test_flow import TOKEN, _fit, _start, _stop, launcher_env

WAIT = 60.0  # the longest any answer below may take (each is due in seconds)
HEAD = (b"POST /v1/metrics/iris/batches HTTP/1.1\r\nHost: test\r\n"
        b"Authorization: Bearer " + TOKEN.encode() + b"\r\n"
        b"Content-Type: application/json\r\n")


def _connect(base: str, rcvbuf: int | None = None) -> socket.socket:
    url = urlsplit(base)
    sock = socket.socket()
    if rcvbuf is not None:  # set before connecting: it bounds the window offered
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, rcvbuf)
    sock.settimeout(WAIT)
    sock.connect((url.hostname, url.port))
    return sock


def _answer(sock: socket.socket) -> bytes:
    """Everything the server sends until it closes the connection."""
    parts = []
    while True:
        part = sock.recv(65536)
        if not part:
            return b"".join(parts)
        parts.append(part)


def _status_and_type(raw: bytes) -> tuple[int, str]:
    head = raw.split(b"\r\n\r\n", 1)[0].decode("latin-1").split("\r\n")
    fields = dict(line.split(": ", 1) for line in head[1:])
    return int(head[0].split()[1]), fields.get("Content-Type", "")


def _trickle(sock: socket.socket, piece: bytes, limit: int | None = None) -> bytes:
    """Send ``piece`` about 20 times a second until the server answers (at most
    ``limit`` times); its whole answer."""
    sock.setblocking(False)
    sent, got = 0, b""
    deadline = time.monotonic() + WAIT
    while not got and time.monotonic() < deadline:
        try:
            got = sock.recv(65536)
        except BlockingIOError:
            assert limit is None or sent < limit, "the whole body went through"
            try:
                sock.send(piece)
                sent += 1
            except OSError:  # the server has shut its side: its answer is on the way
                sock.setblocking(True)
                got = sock.recv(65536)
            time.sleep(0.05)  # the trickle itself
    sock.setblocking(True)
    raw = got + _answer(sock)
    sock.close()
    return raw


def _cutoffs(base: str) -> dict[str, float]:
    """``likewise_client_cutoffs_total`` by phase, added up over the web processes."""
    with urllib.request.urlopen(base + "/metrics", timeout=WAIT) as resp:
        text = resp.read().decode()
    return {s.labels["phase"]: s.value
            for family in text_string_to_metric_families(text)
            for s in family.samples if s.name == "likewise_client_cutoffs_total"}


def _healthy(base: str) -> float:
    """Seconds /healthz took to answer 200 on a new connection."""
    started = time.monotonic()
    with urllib.request.urlopen(base + "/healthz", timeout=WAIT) as resp:
        assert resp.status == 200
    return time.monotonic() - started


@pytest.fixture
def service(settings, tmp_path):
    env = {**launcher_env(settings), "LIKEWISE_WEB_WORKERS": "2",
           "LIKEWISE_CLIENT_SECONDS": "3", "LIKEWISE_CLIENT_MIN_RATE": "10000000"}
    proc, base = _start(env, tmp_path)
    try:
        yield base
    finally:
        _stop(proc)


@pytest.mark.timeout(300)
def test_stalled_heads_and_bodies_are_cut_off_and_the_api_answers(service):
    base = service
    # a body of 1,000 bytes: due within 3 s and a fraction; heads within 3 s
    stalled_bodies = [_connect(base) for _ in range(2)]
    for sock in stalled_bodies:
        sock.sendall(HEAD + b"Content-Length: 1000\r\n\r\n{\"records\": [")
    stalled_heads = [_connect(base) for _ in range(2)]
    for sock in stalled_heads:
        sock.sendall(HEAD)  # no blank line: the head never ends
    # four stalled clients, two one-request processes: the probe still gets through
    assert _healthy(base) < WAIT
    for sock in stalled_bodies:
        raw = _answer(sock)
        assert _status_and_type(raw) == (408, "application/problem+json")
        assert json.loads(raw.split(b"\r\n\r\n", 1)[1])["type"].endswith("request-timeout")
    for sock in stalled_heads:
        assert _answer(sock) == b""  # closed without an answer
    for sock in stalled_bodies + stalled_heads:
        sock.close()

    # a body that trickles in, a byte at a time well under the rate, is cut off too
    sock = _connect(base)
    sock.sendall(HEAD + b"Content-Length: 1000\r\n\r\n")
    raw = _trickle(sock, b" ", limit=999)
    assert _status_and_type(raw)[0] == 408

    # a chunked body is timed by what it sends, not by the route's size limit (64 MiB,
    # which at the minimum rate would allow it almost 10 s): a trickle of it is cut off
    sock = _connect(base)
    sock.sendall(HEAD + b"Transfer-Encoding: chunked\r\n\r\n")
    started = time.monotonic()
    raw = _trickle(sock, b"1\r\n \r\n")
    assert _status_and_type(raw)[0] == 408
    assert time.monotonic() - started < 9.0  # its allowance: 3 s + 1 MiB at the rate

    # a body declared over the limit is refused before any of it is read, token or not
    sock = _connect(base)
    sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: test\r\n"
                 b"Content-Length: 99999999999999\r\n\r\n")
    assert _status_and_type(_answer(sock)) == (413, "application/problem+json")
    sock.close()

    # every cut-off is counted by what the client was late with
    cuts = _cutoffs(base)
    assert cuts["head"] >= 2 and cuts["body"] >= 4, cuts  # 2 stalled, 2 trickles

    # a client that sends at a good pace is served as before
    with Client(base, TOKEN) as http:
        assert http.request("PUT", "/v1/metrics/iris", {"features": IRIS_FEATURES})[0] == 201
        X, labels = iris_batches(1, seed=1)[0]
        assert http.request("POST", "/v1/metrics/iris/batches",
                            records_body(X, labels))[0] == 201


@pytest.mark.timeout(300)
def test_clients_that_stop_reading_their_answer_are_cut_off(service):
    base = service
    with Client(base, TOKEN) as http:
        assert http.request("PUT", "/v1/metrics/iris", {"features": IRIS_FEATURES})[0] == 201
        for X, labels in iris_batches(6):
            assert http.request("POST", "/v1/metrics/iris/batches",
                                records_body(X, labels))[0] == 201
        _fit(http, "iris", {})
    # 100,000 records, each with an id of 200 characters that the answer echoes
    rng = np.random.default_rng(0)
    rows = [[*r, f"{i:0200d}"] for i, r in
            enumerate(rng.normal(5, 1, (100_000, 4)).round(3).tolist())]
    body = json.dumps({"columns": [*IRIS_FEATURES, "id"], "rows": rows, "k": 2}).encode()
    request = (b"POST /v1/metrics/iris/groupings?id_column=id HTTP/1.1\r\nHost: test\r\n"
               b"Authorization: Bearer " + TOKEN.encode() + b"\r\n"
               b"Content-Type: application/json\r\n"
               b"Content-Length: " + str(len(body)).encode() + b"\r\n\r\n" + body)
    readers = [_connect(base, rcvbuf=4096) for _ in range(2)]
    for sock in readers:
        sock.sendall(request)  # then read nothing
    # both processes write answers nobody takes; the probe gets through once a deadline
    # frees one
    assert _healthy(base) < WAIT
    cut = []
    for sock in readers:
        # reading now lets a process whose deadline has not passed yet finish its answer
        raw = _answer(sock)
        head, rest = raw.split(b"\r\n\r\n", 1)
        length = int(next(line.split(b": ", 1)[1] for line in head.split(b"\r\n")
                          if line.lower().startswith(b"content-length")))
        cut.append(len(rest) < length)
        sock.close()
    assert any(cut)  # an answer was cut off at its deadline, not buffered whole
    assert _cutoffs(base)["answer"] >= 1
