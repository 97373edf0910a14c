"""Work a request hands off so its answer does not wait: one daemon thread per process.

A grouping's drift summary is computed and written here, after the answer has gone.
The backlog is bounded: when it is full a job is refused and counted (``refused``),
never queued without limit. :func:`flush` waits (bounded) until every job handed off
so far is done — a reader in the same process calls it to see its own writes — and
then runs the hooks given to :meth:`Backlog.on_flush` (work a job keeps back to
write in batches hands itself over there). A
summary still waiting when its process dies is lost; it is a summary, never an
acknowledged record. After a fork the child starts a backlog of its own.

A thread can :meth:`Backlog.hold` what it hands off until it releases it
(:meth:`Backlog.release`): the web tier holds a request's jobs until the server has
written its answer and closed it, so the backlog's thread does not compete with the
answer being built and encoded (under load it competes with the process's next
request instead). A thread's next hold releases what it still holds, and any
:meth:`Backlog.flush` hands over what every thread of the process holds.
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
        # jobs held back by thread, not handed over yet (see hold); the pid they were
        # held in: a forked child starts holding nothing
        self._held: dict[int, list[tuple[Callable[[], None], str]]] = {}
        self._held_pid = os.getpid()
        self._held_lock = threading.Lock()

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

    def _holds(self) -> dict[int, list[tuple[Callable[[], None], str]]]:
        """(Held lock taken.) The holds of this process."""
        if self._held_pid != os.getpid():  # inherited from the parent: its to hand over
            self._held, self._held_pid = {}, os.getpid()
        return self._held

    def hold(self) -> None:
        """Keep the jobs this thread hands off from now on until :meth:`release`
        (what an earlier hold kept and never released is handed over first)."""
        self.release()
        with self._held_lock:
            self._holds()[threading.get_ident()] = []

    def release(self) -> None:
        """Hand over the jobs this thread held, in order, and stop holding."""
        with self._held_lock:
            held = self._holds().pop(threading.get_ident(), [])
        for job, outcome in held:
            self._put(job, outcome)

    def held(self) -> int:
        """How many jobs this thread holds."""
        with self._held_lock:
            return len(self._holds().get(threading.get_ident(), ()))

    def submit(self, job: Callable[[], None], outcome: str = "a drift summary was dropped",
               may_hold: bool = True) -> bool:
        """Hand ``job`` off; False (and counted) when the backlog is full, logging
        ``outcome``: what becomes of the job then (the caller may run it itself).

        While this thread holds (:meth:`hold`), a job that ``may_hold`` waits for the
        release and the answer is True: if the backlog is full then, the job is dropped
        and counted, logging ``outcome``. A caller that runs a refused job itself passes
        ``may_hold=False``. A thread holds at most ``capacity`` jobs; any more are
        handed over at once."""
        if may_hold:
            with self._held_lock:
                held = self._holds().get(threading.get_ident())
                if held is not None and len(held) < self.capacity:
                    held.append((job, outcome))
                    return True
        return self._put(job, outcome)

    def _put(self, job: Callable[[], None], outcome: str) -> bool:
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

    def _hand_over_held(self) -> None:
        with self._held_lock:
            holds = self._holds()
            taken = [jobs for jobs in holds.values() if jobs]
            for ident in holds:
                holds[ident] = []
        for jobs in taken:
            for job, outcome in jobs:
                self._put(job, outcome)

    def flush(self, timeout: float = 5.0, hooks: bool = True) -> bool:
        """Wait until every job handed off so far is done, then run the flush hooks
        (unless ``hooks`` is False); False if ``timeout`` ran out. What any thread of
        the process holds is handed over first: it counts as handed off (a report
        served on one thread sees the summary of an answer another thread has sent
        but not closed yet); those threads go on holding what they hand off next."""
        self._hand_over_held()
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
