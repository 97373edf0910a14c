"""The web tier's deadlines (``service/deadlines.py``) on real sockets: a read or a
write blocked past its deadline returns at once; a paused deadline shuts nothing."""

from __future__ import annotations

import socket
import time
from types import SimpleNamespace

import pytest

from service.deadlines import Watch

BOUND = 10.0  # every blocking call below gives up after this long


@pytest.fixture
def pair():
    ours, theirs = socket.socketpair()
    ours.settimeout(BOUND)
    yield ours, theirs
    ours.close()
    theirs.close()


def test_a_read_blocked_past_its_deadline_returns_and_the_socket_can_still_answer(pair):
    ours, theirs = pair
    cuts: list[str] = []
    deadline = Watch(on_cut=cuts.append).deadline(SimpleNamespace(sock=ours))
    started = time.monotonic()
    deadline.start(0.2, "body")
    assert ours.recv(10) == b""  # the watcher shut the reading side
    assert 0.15 < time.monotonic() - started < BOUND
    assert deadline.expired and cuts == ["body"]
    ours.sendall(b"408")  # the writing side is open: an answer can still go out
    assert theirs.recv(10) == b"408"


def test_a_write_blocked_past_its_deadline_fails_at_once(pair):
    ours, _theirs = pair  # the peer never reads
    deadline = Watch().deadline(SimpleNamespace(sock=ours))
    deadline.start(0.2, "answer")
    with pytest.raises(OSError):
        while True:
            ours.sendall(b"x" * 65536)  # fills the buffers, then blocks until shut
    assert deadline.expired


def test_a_new_phase_replaces_the_deadline_and_a_pause_clears_it(pair):
    ours, theirs = pair
    watch = Watch()
    deadline = watch.deadline(SimpleNamespace(sock=ours))
    deadline.start(BOUND * 10, "body")
    deadline.start(0.1, "body")  # the later phase's deadline is the one that holds
    assert watch.armed() == 1
    assert ours.recv(10) == b""

    other_ours, other_theirs = socket.socketpair()
    try:
        other = watch.deadline(SimpleNamespace(sock=other_ours))
        other.start(1.0, "body")
        other.pause()  # the work runs: no deadline
        assert watch.armed() == 0
        # a third deadline, due after the paused one would have been, fires alone
        third_ours, third_theirs = socket.socketpair()
        try:
            third_ours.settimeout(BOUND)
            watch.deadline(SimpleNamespace(sock=third_ours)).start(1.5, "body")
            assert third_ours.recv(10) == b""
            other_theirs.sendall(b"ok")  # the paused connection still reads
            other_ours.settimeout(BOUND)
            assert other_ours.recv(10) == b"ok"
            assert not other.expired
        finally:
            third_ours.close()
            third_theirs.close()
    finally:
        other_ours.close()
        other_theirs.close()


def test_allow_gives_the_seconds_plus_the_bytes_at_the_rate(pair):
    ours, _theirs = pair
    deadline = Watch(seconds=0.1, rate=1000, on_cut=None).deadline(SimpleNamespace(sock=ours))
    started = time.monotonic()
    deadline.allow(200, "body")  # 0.1 s + 200 bytes at 1,000 a second = 0.3 s
    assert ours.recv(10) == b""
    assert 0.25 < time.monotonic() - started < BOUND


def test_a_later_deadline_does_not_wake_the_watcher_and_still_fires(pair):
    ours, _theirs = pair
    watch = Watch()
    deadline = watch.deadline(SimpleNamespace(sock=ours))
    deadline.start(2.0, "head")
    deadline.pause()
    woke = watch.wakeups
    # the watcher now waits for the paused deadline's time; each phase of a request
    # sets a deadline later than that, and none of them needs a wakeup before it
    for _ in range(20):
        deadline.start(2.0, "body")
    assert watch.wakeups == woke
    started = time.monotonic()
    assert ours.recv(10) == b""  # the last phase's deadline holds all the same
    assert time.monotonic() - started < BOUND
    assert deadline.expired and deadline.phase == "body"
