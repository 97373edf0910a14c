"""Work a request hands off starts once its answer has been sent.

Each request holds what it hands to the process's backlog (a grouping's drift
summary) and releases it when the server closes the answer, after its last byte has
gone: until then the backlog's thread would compete with the request for the
interpreter while the answer is still being built and encoded. A request whose
answer the server may not close (a file passed straight through) releases at
teardown. A drift report flushes the backlog, which hands over what every thread of
the process holds, so a threaded server's report still sees a summary whose answer
is sent but not closed yet.
"""

from __future__ import annotations

from flask import Flask, Response, g

from service.usecases.backlog import BACKLOG


def _hold() -> None:
    BACKLOG.hold()


def _release_when_sent(response: Response) -> Response:
    if response.direct_passthrough:
        return response  # a file the server may send without closing it: at teardown
    response.call_on_close(BACKLOG.release)
    g.likewise_release_on_close = True
    return response


def _release_unless_answered(_exc: BaseException | None) -> None:
    if not g.get("likewise_release_on_close"):
        BACKLOG.release()


def install(app: Flask) -> None:
    app.before_request(_hold)
    app.after_request(_release_when_sent)
    app.teardown_request(_release_unless_answered)
