"""The queue library's log sentences in our words: a filter on our log handler.

RQ logs its own sentences ("*** Listening on …", "Job OK", "cleaning registries …").
:class:`QueueWords` (installed by :func:`service.logs.dict_config`) rewrites the few an
operator needs into our words, with the worker, job and fit as fields, and lowers
every other record of RQ at info or below to debug (shown only when
``LIKEWISE_LOG_LEVEL=debug``). A warning or error we have no words for keeps its
level, says "the fit queue reported a problem" and carries RQ's text as ``detail``.
Matching is on RQ's message templates (``record.msg``), never on formatted text.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Callable
from typing import Any

_ANSI = re.compile(r"\x1b\[[0-9;]*m")
_FIT_JOB = re.compile(r".+-fit-([0-9a-f]{20})-\d+")


def _plain(value: Any) -> str:
    return _ANSI.sub("", str(value))


def _job(job_id: Any) -> dict[str, Any]:
    job = _plain(job_id)
    found = _FIT_JOB.fullmatch(job)
    return {"job_id": job, **({"fit_id": found.group(1)} if found else {})}


def _last_line(text: Any) -> str:
    lines = [ln.strip() for ln in _plain(text).splitlines() if ln.strip()]
    return lines[-1] if lines else ""


def _taken_or_done(a: tuple) -> tuple[str, dict[str, Any]]:
    # one template serves both "took a job (its description)" and "Job OK"
    if "Job OK" in _plain(a[2]):
        return "fit job ended", {"worker": a[0], **_job(a[3])}
    return "fit job taken", {"worker": a[0], **_job(a[3])}


Words = Callable[[tuple], "tuple[str, dict[str, Any]]"]
WORDS: dict[str, Words] = {
    "Worker %s: started with PID %d, version %s":
        lambda a: ("fit worker started", {"worker": a[0]}),
    "*** Listening on %s...":
        lambda a: ("fit worker waiting for fits", {"queue": _plain(a[0])}),
    "Worker %s: %s: %s (%s)": _taken_or_done,
    "Worker %s: %s: %s":
        lambda a: ("fit job taken", {"worker": a[0], **_job(a[2])}),
    "Worker %s: done, quitting":
        lambda a: ("fit worker stopping: no fit left to run", {"worker": a[0]}),
    "Worker %s: finished executing %d jobs, quitting":
        lambda a: ("fit worker stopping after its job limit", {"worker": a[0], "jobs": a[1]}),
    "Worker %s: idle for %d seconds, quitting":
        lambda a: ("fit worker stopping: idle too long", {"worker": a[0]}),
    "Worker %s: stopping on request":
        lambda a: ("fit worker stopping as asked", {"worker": a[0]}),
    "Worker %s [PID %d]: warm shut down requested":
        lambda a: ("fit worker asked to stop; finishing the current fit", {"worker": a[0]}),
    "Worker %s: cold shut down":
        lambda a: ("fit worker stopping now", {"worker": a[0]}),
    "Worker %s: job %s failed (%s)":
        lambda a: ("fit job failed", {"worker": a[0], **_job(a[1]), "error": _last_line(a[2])}),
    "Worker %s: job %s: exception raised while executing (%s)\n%s":
        lambda a: ("fit job raised an error",
                   {"worker": a[0], **_job(a[1]), "error": _last_line(a[3])}),
    "Job %s: enqueued for retry, %s remaining":
        lambda a: ("fit job queued again for another attempt",
                   {**_job(a[0]), "attempts_left": a[1]}),
    "Worker %s: job %s has exceeded maximum retry attempts (%d)":
        lambda a: ("fit job has no attempt left", {"worker": a[0], **_job(a[1])}),
    "Work horse killed for job %s: retpid=%s, ret_val=%s":
        lambda a: ("the process running a fit job was killed", _job(a[0])),
    "Worker %s: Redis connection timeout, quitting...":
        lambda a: ("fit worker lost Redis; stopping", {"worker": a[0]}),
    "Worker %s: found an unhandled exception, quitting...":
        lambda a: ("fit worker stopping on an unexpected error", {"worker": a[0]}),
    "Worker %s: could not connect to Redis instance: %s retrying in %d seconds...":
        lambda a: ("fit worker cannot reach Redis; trying again",
                   {"worker": a[0], "retry_seconds": a[2]}),
}


def _is_queue(record: logging.LogRecord) -> bool:
    return record.name == "rq" or record.name.startswith("rq.")


LOGGER = "likewise.worker"  # the name RQ's records are shown under


def reword(record: logging.LogRecord) -> bool:
    """Rewrite ``record`` (an RQ record) in place; False to drop it."""
    args = record.args if isinstance(record.args, tuple) else ()
    record.name = LOGGER
    words = WORDS.get(str(record.msg))
    if words is not None:
        try:
            message, fields = words(args)
        except (IndexError, TypeError):
            message, fields = "the fit queue reported an event", {}
        record.msg, record.args = message, ()
        for key, value in fields.items():
            setattr(record, key, value)
        return True
    if record.levelno >= logging.WARNING:
        record.detail = _plain(record.getMessage())
        record.msg, record.args = "the fit queue reported a problem", ()
        return True
    record.levelno, record.levelname = logging.DEBUG, "DEBUG"
    return logging.getLogger().isEnabledFor(logging.DEBUG)


class QueueWords(logging.Filter):
    """Our words for RQ's records; other records pass unchanged."""

    def filter(self, record: logging.LogRecord) -> bool:
        return reword(record) if _is_queue(record) else True


__all__ = ["WORDS", "QueueWords", "reword"]
