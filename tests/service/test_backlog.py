"""The per-process backlog that writes drift summaries after the answer has gone."""

from __future__ import annotations

import threading

from service.usecases.backlog import Backlog


def test_jobs_run_in_order_and_flush_waits_for_them() -> None:
    backlog = Backlog(capacity=16)
    release = threading.Event()
    done: list[int] = []
    backlog.submit(lambda: release.wait(10))  # holds the thread until released
    for i in range(5):
        assert backlog.submit(lambda i=i: done.append(i))
    assert not backlog.flush(timeout=0.05) and done == []  # still held: flush says so
    release.set()
    assert backlog.flush(timeout=10) and done == [0, 1, 2, 3, 4]


def test_a_full_backlog_drops_and_counts_and_a_failing_job_stops_nothing() -> None:
    backlog = Backlog(capacity=2)
    release = threading.Event()
    ran: list[str] = []
    backlog.submit(lambda: release.wait(10))
    # the thread may or may not have taken the first job yet: fill until one is refused
    accepted = [backlog.submit(lambda: ran.append("x")) for _ in range(3)]
    assert accepted.count(False) >= 1 and backlog.refused == accepted.count(False)

    def boom() -> None:
        raise RuntimeError("a summary that cannot be written")

    release.set()
    assert backlog.flush(timeout=10)
    assert backlog.submit(boom) and backlog.submit(lambda: ran.append("after"))
    assert backlog.flush(timeout=10) and ran[-1] == "after"


def test_flush_in_a_process_that_handed_nothing_off_returns_at_once() -> None:
    assert Backlog().flush(timeout=0)
