"""Deadlines for the exchange with a client, so a slow or stalled client cannot hold
a web process.

A web process serves one request at a time (``service/webserver.py``). Without a
deadline, a client that sends a request's head or body a byte at a time — or stops
sending, or stops reading the answer — keeps that process from every other request
for as long as it likes, and as many such clients as there are web processes stall
the API (measured: three connections that each sent part of a request held a
three-process server for good).

So every exchange is timed, in phases:

- the request line and headers must arrive within ``client_seconds``;
- a body must arrive within ``client_seconds`` plus its length at
  ``client_min_rate`` bytes a second, checked every 1 MiB as it arrives
  (``service/api/bodies.py``), so a chunked body is timed by what it sends;
- the answer must be taken within ``client_seconds`` plus its length at that rate.

The work between the body and the answer (a grouping's k-means, a parse) has no
deadline. When a phase's deadline passes, :class:`Watch`'s thread shuts the
connection's socket — its reading side while the request is read, so a 408 problem
can still be sent; both sides while the answer is written — and the blocked call
returns at once: the process is free again.
"""

from __future__ import annotations

import heapq
import itertools
import math
import socket
import threading
import time
from collections.abc import Callable
from typing import Any

ENVIRON_KEY = "likewise.deadline"  # the exchange's Deadline, in a WSGI environ
PHASES = ("head", "body", "answer")  # what the client was late with


class Deadline:
    """One connection's current deadline (none while the work runs). ``conn`` is
    anything with a ``sock`` attribute, read when the deadline passes (a server may
    wrap the socket once the exchange has started)."""

    def __init__(self, watch: Watch, conn: Any) -> None:
        self._watch, self._conn = watch, conn
        self.at: float | None = None
        self.how = socket.SHUT_RD
        self.phase = "head"
        # set by the watcher once it has shut the socket (for good: the connection is
        # then done)
        self.expired = False
        self._token = 0

    def start(self, seconds: float, phase: str) -> None:
        """A new phase (:data:`PHASES`), due ``seconds`` from now."""
        self.phase = phase
        self._watch.set(self, time.monotonic() + seconds,
                        socket.SHUT_RDWR if phase == "answer" else socket.SHUT_RD)

    def allow(self, nbytes: int, phase: str, since: float | None = None) -> None:
        """A new phase that moves ``nbytes``: due ``client_seconds`` after ``since``
        (default now) plus ``nbytes`` at ``client_min_rate`` (the watch's rule)."""
        w = self._watch
        due = (time.monotonic() if since is None else since) + w.seconds + nbytes / w.rate
        self.start(max(0.0, due - time.monotonic()), phase)

    def pause(self) -> None:
        """No deadline until the next phase starts (the work runs)."""
        self._watch.set(self, None, self.how)

    @property
    def sock(self) -> socket.socket:
        return self._conn.sock


class Watch:
    """The deadlines of one process's connections and the thread that enforces them
    (started on first use, so a process that forks gets its own)."""

    def __init__(self, seconds: float = 10.0, rate: float = 100_000.0,
                 on_cut: Callable[[str], None] | None = None) -> None:
        """``seconds`` and ``rate``: ``client_seconds`` and ``client_min_rate``, the
        rule of :meth:`Deadline.allow`; ``on_cut(phase)`` is told of every connection
        shut (a counter: quick)."""
        self.seconds, self.rate = float(seconds), float(rate)
        self._on_cut = on_cut
        self._cond = threading.Condition()
        self._heap: list[tuple[float, int, Deadline]] = []
        self._order = itertools.count()
        self._thread: threading.Thread | None = None
        # when the watcher's current wait ends (inf: it waits for a notify); a deadline
        # due no earlier needs no wakeup — a request's phases each set a later one, and
        # a wakeup per phase cost the request a thread switch
        self._wake = math.inf
        self.wakeups = 0  # times the watcher woke (for tests)

    def deadline(self, conn: Any) -> Deadline:
        return Deadline(self, conn)

    def set(self, d: Deadline, at: float | None, how: int) -> None:
        with self._cond:
            d.at, d.how = at, how
            d._token = next(self._order)  # an older heap entry of d is now stale
            if at is not None:
                heapq.heappush(self._heap, (at, d._token, d))
                if self._thread is None:
                    self._thread = threading.Thread(target=self._run, name="likewise-deadlines",
                                                    daemon=True)
                    self._thread.start()
                if at < self._wake:
                    self._cond.notify()

    def armed(self) -> int:
        """Deadlines still running (for tests)."""
        with self._cond:
            return sum(1 for at, token, d in self._heap if d._token == token and d.at == at)

    def _run(self) -> None:
        while True:
            with self._cond:
                # under the lock, so a phase that starts (or a pause) meanwhile is never
                # cut by the deadline it replaced; shutdown does not block
                if not self._shut_due():
                    wait = self._wait()
                    self._wake = math.inf if wait is None else time.monotonic() + wait
                    self._cond.wait(wait)
                    self.wakeups += 1
                    self._wake = -math.inf  # awake: it looks at the heap before waiting

    def _shut_due(self) -> bool:
        now, shut = time.monotonic(), False
        while self._heap and self._heap[0][0] <= now:
            at, token, d = heapq.heappop(self._heap)
            if d._token == token and d.at == at:  # still the connection's deadline
                d.expired, d.at, shut = True, None, True
                sock = d.sock
                if sock.fileno() == -1:  # closed meanwhile: nothing to cut
                    continue
                if self._on_cut is not None:  # before the shutdown wakes the request
                    self._on_cut(d.phase)
                try:
                    # the plain socket's shutdown: a TLS socket's own would also drop
                    # its TLS state, and a 408 could no longer be sent over it
                    socket.socket.shutdown(sock, d.how)
                except OSError:  # the client has gone meanwhile
                    pass
        return shut

    def _wait(self) -> float | None:
        while self._heap:  # drop stale entries so an idle process sleeps
            at, token, d = self._heap[0]
            if d._token == token and d.at == at:
                return max(0.0, at - time.monotonic())
            heapq.heappop(self._heap)
        return None


def of(environ: dict[str, Any]) -> Deadline | None:
    """The exchange's deadline, when a web process runs the app (none in tests)."""
    return environ.get(ENVIRON_KEY)
