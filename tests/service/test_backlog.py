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


def test_held_jobs_wait_for_their_release_and_a_flush_or_the_next_hold_releases_them(
) -> None:
    backlog = Backlog(capacity=16)
    done: list[str] = []
    backlog.hold()
    assert backlog.submit(lambda: done.append("a")) and backlog.submit(lambda: done.append("b"))
    assert backlog.held() == 2
    # nothing reached the thread: another thread's flush has nothing to wait for
    other = threading.Thread(target=lambda: done.append(f"flushed {backlog.flush(timeout=5)}"))
    other.start()
    other.join(10)
    assert done == ["flushed True"] and backlog.held() == 2
    backlog.release()
    assert backlog.held() == 0 and backlog.flush(timeout=10)
    assert done == ["flushed True", "a", "b"]  # in the order they were handed off

    backlog.hold()
    backlog.submit(lambda: done.append("c"))
    backlog.hold()  # a hold that was never released: its jobs go first
    assert backlog.held() == 0 and backlog.flush(timeout=10) and done[-1] == "c"

    backlog.hold()
    backlog.submit(lambda: done.append("d"))
    assert backlog.held() == 1
    assert backlog.flush(timeout=10) and done[-1] == "d"  # this thread's flush releases
    assert backlog.submit(lambda: None) and backlog.held() == 0  # no longer holding


def test_a_job_that_must_not_wait_and_jobs_past_the_capacity_are_handed_over_at_once(
) -> None:
    backlog = Backlog(capacity=2)
    done: list[str] = []
    backlog.hold()
    assert backlog.submit(lambda: done.append("now"), may_hold=False)
    assert backlog.held() == 0
    for i in range(3):
        backlog.submit(lambda i=i: done.append(str(i)))
    assert backlog.held() == 2  # the third went straight to the queue

    def others_flush() -> None:  # waits for what reached the queue, not for what is held
        assert backlog.flush(timeout=10)

    other = threading.Thread(target=others_flush)
    other.start()
    other.join(10)
    assert done == ["now", "2"] and backlog.held() == 2
    backlog.release()
    assert backlog.flush(timeout=10) and done == ["now", "2", "0", "1"]
    assert backlog.refused == 0
