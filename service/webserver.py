"""gunicorn settings of the web tier (``gunicorn -c python:service.webserver …``).

Each web process serves with a few threads (gunicorn's ``gthread`` worker), so a
request that parses a large body does not hold up ``/healthz`` or small requests
behind it; ``LIKEWISE_WEB_WORKERS`` sets the number of processes.

Some requests never reach the app: gunicorn itself refuses an over-long request
line (414), too many or too large headers (431) and malformed HTTP (400). Its own
answer to those is an HTML page; loading this module replaces that writer, so these
answers are RFC 9457 problem+json like every other answer of the service.
"""

from __future__ import annotations

import json

from gunicorn import util

from service.errors import PROBLEM_BASE

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

worker_class = "gthread"
threads = 4

# the HTTP limits gunicorn applies before the app (its defaults, stated here)
limit_request_line = 4094
limit_request_fields = 100
limit_request_field_size = 8190
