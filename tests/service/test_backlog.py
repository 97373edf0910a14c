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


def test_held_jobs_wait_for_their_release_and_a_flush_or_the_next_hold_hands_them_over(
) -> None:
    backlog = Backlog(capacity=16)
    done: list[str] = []
    backlog.hold()
    assert backlog.submit(lambda: done.append("a")) and backlog.submit(lambda: done.append("b"))
    assert backlog.held() == 2 and done == []
    backlog.release()
    assert backlog.held() == 0 and backlog.flush(timeout=10)
    assert done == ["a", "b"]  # in the order they were handed off

    backlog.hold()
    backlog.submit(lambda: done.append("c"))
    backlog.hold()  # a hold that was never released: its jobs go first
    assert backlog.held() == 0 and backlog.flush(timeout=10) and done[-1] == "c"

    # a flush on another thread (a report served there) hands over what this thread
    # holds, and waits for it; this thread goes on holding what it hands off next
    backlog.submit(lambda: done.append("d"))
    assert backlog.held() == 1
    other = threading.Thread(target=lambda: done.append(f"flushed {backlog.flush(timeout=5)}"))
    other.start()
    other.join(10)
    assert done[-2:] == ["d", "flushed True"] and backlog.held() == 0
    backlog.submit(lambda: done.append("e"))
    assert backlog.held() == 1
    assert backlog.flush(timeout=10) and done[-1] == "e"  # this thread's flush too
    backlog.release()
    assert backlog.submit(lambda: None) and backlog.held() == 0  # no longer holding


def test_a_job_that_must_not_wait_and_jobs_past_the_capacity_are_handed_over_at_once(
) -> None:
    backlog = Backlog(capacity=3)
    done: list[str] = []
    backlog.hold()
    assert backlog.submit(lambda: done.append("now"), may_hold=False)
    assert backlog.held() == 0
    for i in range(4):
        backlog.submit(lambda i=i: done.append(str(i)))
    assert backlog.held() == 3  # the fourth went straight to the queue
    backlog.release()
    assert backlog.flush(timeout=10)
    assert done[:2] == ["now", "3"] and len(done) + backlog.refused == 5


def test_a_forked_child_holds_nothing_of_its_parent() -> None:
    import os

    backlog = Backlog(capacity=4)
    backlog.hold()
    backlog.submit(lambda: None)
    pid = os.fork()
    if pid == 0:  # the child: the parent's held job is the parent's to hand over
        os._exit(0 if backlog.held() == 0 else 1)
    _, status = os.waitpid(pid, 0)
    assert os.waitstatus_to_exitcode(status) == 0 and backlog.held() == 1
    backlog.release()
    assert backlog.flush(timeout=10)
