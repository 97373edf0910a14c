"""Work a request hands off so its answer does not wait: one daemon thread per process.

A grouping's drift summary is computed and written here, after the answer has gone.
The backlog is bounded: when it is full a job is refused and counted (``refused``),
never queued without limit. :func:`flush` waits (bounded) until every job handed off
so far is done — a reader in the same process calls it to see its own writes — and
then runs the hooks given to :meth:`Backlog.on_flush` (work a job keeps back to
write in batches hands itself over there). A
summary still waiting when its process dies is lost; it is a summary, never an
acknowledged record. After a fork the child starts a backlog of its own.
"""

from __future__ import annotations

import logging
import os
import queue
import threading
import time
from collections.abc import Callable

log = logging.getLogger(__name__)

CAPACITY = 1024


class Backlog:
    def __init__(self, capacity: int = CAPACITY) -> None:
        self.capacity = capacity
        self.refused = 0  # jobs the full backlog did not take
        self._lock = threading.Lock()
        self._pid: int | None = None
        self._jobs: queue.Queue[Callable[[], None]] = queue.Queue(capacity)
        self._on_flush: list[Callable[[], None]] = []

    def on_flush(self, hook: Callable[[], None]) -> None:
        """Run ``hook`` at every :meth:`flush`, once the jobs handed off are done."""
        self._on_flush.append(hook)

    def _ensure(self) -> queue.Queue[Callable[[], None]]:
        if self._pid != os.getpid():
            with self._lock:
                if self._pid != os.getpid():  # first use, or a forked child
                    self._jobs = queue.Queue(self.capacity)
                    threading.Thread(target=self._run, args=(self._jobs,), daemon=True,
                                     name="likewise-backlog").start()
                    self._pid = os.getpid()
        return self._jobs

    def submit(self, job: Callable[[], None], outcome: str = "a drift summary was dropped"
               ) -> bool:
        """Hand ``job`` off; False (and counted) when the backlog is full, logging
        ``outcome``: what becomes of the job then (the caller may run it itself)."""
        try:
            self._ensure().put_nowait(job)
            return True
        except queue.Full:
            self.refused += 1
            log.warning("backlog full (%d jobs): %s", self.capacity, outcome)
            return False

    @staticmethod
    def _run(jobs: queue.Queue[Callable[[], None]]) -> None:
        while True:
            job = jobs.get()
            try:
                job()
            except Exception:  # noqa: BLE001 — one bad job must not stop the others
                log.exception("a handed-off job failed")
            finally:
                jobs.task_done()

    def flush(self, timeout: float = 5.0, hooks: bool = True) -> bool:
        """Wait until every job handed off so far is done, then run the flush hooks
        (unless ``hooks`` is False); False if ``timeout`` ran out."""
        if self._pid != os.getpid():
            return True  # nothing was handed off in this process
        jobs = self._jobs
        deadline = time.monotonic() + timeout
        with jobs.all_tasks_done:
            while jobs.unfinished_tasks:
                left = deadline - time.monotonic()
                if left <= 0:
                    return False
                jobs.all_tasks_done.wait(left)
        for hook in self._on_flush if hooks else ():
            try:
                hook()
            except Exception:  # noqa: BLE001 — like a failed job: logged, the rest still run
                log.exception("a flush hook failed")
        return True


BACKLOG = Backlog()
