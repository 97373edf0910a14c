"""How every likewise process logs: one line per event, JSON objects or plain text.

``LIKEWISE_LOG_FORMAT`` chooses ``json`` (one object per line: ``time``, ``level``,
``logger``, ``message``, ``request_id`` where there is one, and the event's own
fields, e.g. a request's ``route``, ``status``, ``duration_ms``, ``metric``,
``fit_id``) or ``text``; by default JSON, unless the output is a terminal. The web
tier (through gunicorn's ``logconfig_dict``), the fit workers and the launcher all
call :func:`dict_config`; nothing is configured at import time.

The queue library's own log sentences never reach these lines verbatim: the
:class:`workers.logwords.QueueWords` filter says the few worth keeping in our words
and lowers the rest to debug.
"""

from __future__ import annotations

import logging
import logging.config
import os
import sys
from collections.abc import Mapping
from typing import Any

FORMAT_ENV = "LIKEWISE_LOG_FORMAT"
FORMATS = ("json", "text")
LEVEL_ENV = "LIKEWISE_LOG_LEVEL"


def log_format(environ: Mapping[str, str] | None = None, stream: Any = None) -> str:
    """``json`` or ``text``: ``LIKEWISE_LOG_FORMAT``, else text on a terminal."""
    env = os.environ if environ is None else environ
    chosen = (env.get(FORMAT_ENV) or "").strip().lower()
    if chosen:
        if chosen not in FORMATS:
            raise ValueError(f"{FORMAT_ENV} must be json or text, got {chosen!r}")
        return chosen
    stream = sys.stderr if stream is None else stream
    return "text" if getattr(stream, "isatty", lambda: False)() else "json"


class RequestContext(logging.Filter):
    """Adds the current request's id (``request_id``) to records logged inside one."""

    def filter(self, record: logging.LogRecord) -> bool:
        if getattr(record, "request_id", None) is None:
            try:
                from flask import g, has_request_context

                if has_request_context() and g.get("request_id"):
                    record.request_id = g.request_id
            except ImportError:  # pragma: no cover — flask ships with the service
                pass
        return True


class TextFormatter(logging.Formatter):
    """``time level logger: message [request id]``."""

    def __init__(self) -> None:
        super().__init__("%(asctime)s %(levelname)s %(name)s: %(message)s")

    def format(self, record: logging.LogRecord) -> str:
        line = super().format(record)
        rid = getattr(record, "request_id", None)
        return f"{line} [{rid}]" if rid else line


def json_formatter() -> logging.Formatter:
    from pythonjsonlogger.json import JsonFormatter

    return JsonFormatter(["levelname", "name", "message"], timestamp="time",
                         rename_fields={"levelname": "level", "name": "logger"})


def dict_config(fmt: str | None = None, level: str | None = None) -> dict[str, Any]:
    """A :func:`logging.config.dictConfig` document: every record to stderr in ``fmt``;
    gunicorn's own loggers go the same way (its access log is off: the app logs each
    request itself, with its id)."""
    fmt = fmt or log_format()
    level = (level or os.environ.get(LEVEL_ENV) or "INFO").upper()
    formatter = ({"()": "service.logs.json_formatter"} if fmt == "json"
                 else {"()": "service.logs.TextFormatter"})
    handler = {"class": "logging.StreamHandler", "stream": "ext://sys.stderr",
               "formatter": "likewise", "filters": ["request", "queue"]}
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "filters": {"request": {"()": "service.logs.RequestContext"},
                    "queue": {"()": "workers.logwords.QueueWords"}},
        "formatters": {"likewise": formatter},
        "handlers": {"likewise": handler},
        "root": {"level": level, "handlers": ["likewise"]},
        "loggers": {
            "gunicorn.error": {"level": level, "handlers": ["likewise"], "propagate": False},
            "gunicorn.access": {"level": "WARNING", "handlers": [], "propagate": False},
        },
    }


def configure(fmt: str | None = None, level: str | None = None) -> None:
    """Configure this process's logging (entry points only: the worker, the launcher)."""
    logging.config.dictConfig(dict_config(fmt, level))
