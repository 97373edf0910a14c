"""gunicorn settings of the web tier (``gunicorn -c python:service.webserver …``).

Each web process serves one request at a time and takes a new connection only when
it is free: gunicorn's threaded worker (:class:`Worker`, ``gthread`` with deadlines)
with one thread, one connection and no keep-alive (every answer closes its
connection). The requests that cost are CPU work under one GIL (a grouping's
k-means, a body's parse), so a second request in a busy process would only wait for
the first one's GIL while another process sits idle; and a kept-alive connection
stays with the process it first reached, so a few busy clients could pile onto one
process. A free process accepts the next connection instead, and the default of one
process more than cores (``LIKEWISE_WEB_WORKERS``) keeps one free for ``/healthz``
while the others parse large bodies. The threaded worker (rather than gunicorn's
``sync``) keeps its heartbeat going while a long request runs, so no request is cut
off by gunicorn's worker timeout.

Some requests never reach the app: gunicorn itself refuses an over-long request
line (414), too many or too large headers (431) and malformed HTTP (400). Its own
answer to those is an HTML page; loading this module replaces that writer, so these
answers are RFC 9457 problem+json like every other answer of the service.

``/metrics`` adds up every web process (prometheus-client's multiprocess mode): the
processes write their samples to files in ``PROMETHEUS_MULTIPROC_DIR``. On start
the server uses the folder the launcher made (emptying it) or makes a private one of
its own (removed on exit); when a web process exits its live gauges are dropped.

Every exchange with a client is timed (:mod:`service.deadlines`): the request's head
within ``LIKEWISE_CLIENT_SECONDS``, a body and the answer within that plus their
length at ``LIKEWISE_CLIENT_MIN_RATE`` bytes a second; the work in between has no
deadline. :class:`Worker` is gunicorn's threaded worker with those deadlines: a
client that stalls or trickles cannot hold a one-request process.

Logging: ``logconfig_dict`` is :func:`service.logs.dict_config` (read when gunicorn
loads this module), so gunicorn's lines and the app's share one format.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
import threading
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Any

from gunicorn import util
from gunicorn.workers.gthread import ThreadWorker

from service.config import Settings
from service.deadlines import ENVIRON_KEY, PHASES, Deadline, Watch
from service.errors import PROBLEM_BASE
from service.logs import dict_config

_SLUGS = {400: "malformed-request", 403: "forbidden", 414: "uri-too-long",
          417: "malformed-request", 431: "headers-too-large", 500: "internal-error",
          501: "malformed-request"}


def problem_bytes(status: int, reason: str, message: str) -> bytes:
    """A whole HTTP/1.1 response carrying a problem body (the connection closes)."""
    body = json.dumps({
        "type": PROBLEM_BASE + _SLUGS.get(status, "malformed-request"),
        "title": reason,
        "status": status,
        "detail": message or reason,
    }).encode()
    head = (f"HTTP/1.1 {status} {reason}\r\nConnection: close\r\n"
            f"Content-Type: application/problem+json\r\nContent-Length: {len(body)}\r\n\r\n")
    return head.encode("latin-1") + body


def _write_problem(sock, status_int, reason, mesg) -> None:  # noqa: ANN001 — gunicorn's
    util.write_nonblock(sock, problem_bytes(int(status_int), str(reason), str(mesg)))


util.write_error = _write_problem  # read by gunicorn's workers when they answer an error

MULTIPROC_ENV = "PROMETHEUS_MULTIPROC_DIR"
_made: list[str] = []  # a folder this server made itself (removed on exit)


def prepare_multiprocess_dir(environ: Any = os.environ) -> str:
    """The folder of the web processes' samples, empty and private (700).

    Called in the gunicorn master before any web process starts (and before any of
    them imports prometheus-client, which reads the variable once at import).
    """
    path = environ.get(MULTIPROC_ENV)
    if not path:
        path = tempfile.mkdtemp(prefix="likewise-metrics-")
        environ[MULTIPROC_ENV] = path
        _made.append(path)
    folder = Path(path)
    folder.mkdir(mode=0o700, parents=True, exist_ok=True)
    folder.chmod(0o700)
    for stale in folder.glob("*.db"):  # samples of an earlier start
        stale.unlink(missing_ok=True)
    return path


def on_starting(_server: Any) -> None:
    prepare_multiprocess_dir()


def post_worker_init(_worker: Any) -> None:
    """Each web process starts its body-parsing helper before it serves."""
    from service.api import offload

    offload.warm()


def child_exit(_server: Any, worker: Any) -> None:
    from prometheus_client import multiprocess

    multiprocess.mark_process_dead(worker.pid)


def on_exit(_server: Any) -> None:
    for path in _made:
        shutil.rmtree(path, ignore_errors=True)


# every line in LIKEWISE_LOG_FORMAT (JSON by default), gunicorn's own included; no
# access log: the app logs each request itself, with its id
logconfig_dict = dict_config()
accesslog = None

class _TimedAnswer:
    """The answer's chunks, each to be taken by the client within the deadline of
    its length; producing the next chunk is not timed."""

    def __init__(self, chunks: Iterable[bytes], deadline: Deadline) -> None:
        self._chunks, self._deadline = chunks, deadline

    def __iter__(self) -> Iterator[bytes]:
        chunks = iter(self._chunks)
        while True:
            self._deadline.pause()
            try:
                chunk = next(chunks)
            except StopIteration:
                break
            self._deadline.allow(len(chunk), "answer")
            yield chunk
        self._deadline.allow(0, "answer")  # the server's last bytes

    def close(self) -> None:
        close = getattr(self._chunks, "close", None)
        if close is not None:
            close()


def _cut_counter() -> Callable[[str], None]:
    """``likewise_client_cutoffs_total{phase}``: connections shut at a deadline. Made in
    the web process (prometheus-client's multiprocess mode: ``/metrics`` adds up every
    process's files), so the app's scrape reports it."""
    from prometheus_client import Counter

    counter = Counter("likewise_client_cutoffs", "Connections shut because the client "
                      "was late with its request's head, its body or taking the answer.",
                      ["phase"])
    for phase in PHASES:
        counter.labels(phase)  # every phase shows, at 0 until it happens
    return lambda phase: counter.labels(phase).inc()


def _size(wrapped: Any) -> int:
    """The size of the file a ``wsgi.file_wrapper`` sends (0 when unknown)."""
    try:
        return os.fstat(wrapped.filelike.fileno()).st_size
    except (AttributeError, OSError, ValueError):
        return 0


class Worker(ThreadWorker):
    """gunicorn's threaded worker with a deadline on every exchange with a client."""

    def init_process(self) -> None:
        settings = Settings.from_env()
        self._watch = Watch(settings.client_seconds, settings.client_min_rate,
                            on_cut=_cut_counter())
        self._current = threading.local()  # the deadline of the thread's exchange
        super().init_process()

    def load_wsgi(self) -> None:
        super().load_wsgi()
        self.wsgi = self._timed(self.wsgi)

    def handle(self, conn: Any) -> Any:
        deadline = getattr(conn, "likewise_deadline", None)
        if deadline is None:
            deadline = conn.likewise_deadline = self._watch.deadline(conn)
        deadline.allow(0, "head")  # the request line and headers
        self._current.deadline = deadline
        try:
            return super().handle(conn)
        finally:
            self._current.deadline = None
            deadline.pause()

    def _timed(self, app: Callable[..., Any]) -> Callable[..., Any]:
        def timed(environ: dict[str, Any], start_response: Callable[..., Any]) -> Any:
            deadline = getattr(self._current, "deadline", None)
            if deadline is None:
                return app(environ, start_response)
            # the app times the body (service.api.bodies): it knows the route's limit
            environ[ENVIRON_KEY] = deadline
            answer = app(environ, start_response)
            files = environ.get("wsgi.file_wrapper")
            if files is not None and isinstance(answer, files):
                # a file is sent in one go (sendfile): one deadline for its size
                deadline.allow(_size(answer), "answer")
                return answer
            return _TimedAnswer(answer, deadline)

        return timed


worker_class = "service.webserver.Worker"
# one exchange per connection at a time: the deadlines are per connection, so HTTP/2's
# streams (several exchanges on one connection) are not served (gunicorn's default)
http_protocols = "h1"
threads = 1
worker_connections = 1  # accept only when free (the connection in hand counts)
keepalive = 0  # close after each answer: the next request goes to a free process

# the HTTP limits gunicorn applies before the app (its defaults, stated here)
limit_request_line = 4094
limit_request_fields = 100
limit_request_field_size = 8190
