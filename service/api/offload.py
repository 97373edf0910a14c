"""Large JSON tables are parsed in a helper process, so parsing never stalls the API.

``json.loads`` holds its process's GIL for the whole parse: a few large bodies
parsed at once would leave a web process unable to answer anything else (``/healthz``
included) for seconds. A JSON table body over :data:`OFFLOAD_BYTES` is therefore
parsed, checked and turned into a :class:`~service.tables.Table` by one helper
process per web process (started on first use, with the ``forkserver`` method); the
request's thread waits on it without holding the GIL. Errors come back as the same
problems an inline parse gives.

A body that is a plain number table (``columns`` + ``rows`` of numbers only, no
column to echo) of at most ``jsonio.INLINE_BYTES`` (64 MiB) is read inline instead:
simdjson parses it in time linear in the body into one float64 matrix
(``service.api.jsonio.number_rows``), holding the GIL for a fraction of a second at
most, and shipping it to the helper would cost more than the parse.
"""

from __future__ import annotations

import atexit
import functools
import multiprocessing
import threading
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from typing import Any

from marshmallow import ValidationError

from service import errors as service_errors
from service.errors import ServiceError, Unavailable
from service.tables import Table, from_json, from_number_rows

from .jsonio import UNSURE, number_rows

OFFLOAD_BYTES = 1024 * 1024
_lock = threading.Lock()
_pool: ProcessPoolExecutor | None = None


@functools.cache
def _schema(kind: str):  # noqa: ANN202 — a marshmallow Schema
    """One schema per kind and process: a load keeps no state in the schema, and
    building one (it copies its declared fields) cost more than loading a grouping's
    envelope."""
    from .schemas import BatchSchema, GroupingSchema

    return {"batch": BatchSchema, "grouping": GroupingSchema}[kind]()


def parse_table(raw: bytes, kind: str, caps: tuple[int, int],
                keep: tuple[str, ...]) -> tuple[str, Any]:
    """In the helper: ``("ok", (table, envelope))`` or the error, as plain data."""
    from .schemas import load_json

    try:
        data = load_json(raw, _schema(kind))
        table = from_json(data, *caps)
        return "ok", _finish(data, table, keep)
    except ServiceError as exc:
        return "problem", (type(exc).__name__, exc.detail, exc.errors)
    except ValidationError as exc:
        return "invalid", exc.messages


def _finish(data: dict[str, Any], table: Table, keep: tuple[str, ...]
            ) -> tuple[Table, dict[str, Any]]:
    if "groups" in data:
        table = table.with_groups(data["groups"])
    envelope = {k: v for k, v in data.items() if k not in ("records", "columns", "rows",
                                                            "groups")}
    return table.portable(keep), envelope


def _number_table(raw: bytes, kind: str, caps: tuple[int, int]
                  ) -> tuple[Table, dict[str, Any]] | None:
    """A number table's body read inline (see the module doc), or None."""
    parsed = number_rows(raw)
    if parsed is UNSURE:
        return None
    envelope, X = parsed  # type: ignore[misc]
    # the schema checks the envelope; its rows field only asks for a non-empty list
    data = _schema(kind).load({**envelope, "rows": [None] * X.shape[0]})
    return _finish(data, from_number_rows(data["columns"], X, *caps), ())


def _executor() -> ProcessPoolExecutor:
    global _pool
    with _lock:
        if _pool is None:
            context = multiprocessing.get_context("forkserver")
            # the helper starts with the parsing modules (and what they import) loaded
            context.set_forkserver_preload(["service.api.offload", "service.api.schemas"])
            _pool = ProcessPoolExecutor(max_workers=1, mp_context=context)
            atexit.register(_pool.shutdown, wait=False, cancel_futures=True)
        return _pool


def warm() -> None:
    """Start the helper in the background now (a web process calls this as it
    starts), so the first large body does not wait for it to boot."""
    _executor().submit(int)


def _reset() -> None:
    global _pool
    with _lock:
        if _pool is not None:
            _pool.shutdown(wait=False, cancel_futures=True)
        _pool = None


def read_json_table(raw: bytes, kind: str, caps: tuple[int, int],
                    keep: tuple[str, ...] = ()) -> tuple[Table, dict[str, Any]]:
    """The table and the rest of the envelope of a JSON batch (``kind="batch"``) or
    grouping (``"grouping"``) body; ``keep`` names columns whose raw values must come
    back (an id column to echo)."""
    if not keep:
        quick = _number_table(raw, kind, caps)
        if quick is not None:
            return quick
    if len(raw) <= OFFLOAD_BYTES:
        outcome, value = parse_table(raw, kind, caps, keep)
    else:
        try:
            outcome, value = _executor().submit(parse_table, raw, kind, caps, keep).result()
        except BrokenProcessPool as exc:  # the helper died (e.g. out of memory)
            _reset()
            raise Unavailable("The body parser stopped; try again.") from exc
    if outcome == "ok":
        return value
    if outcome == "invalid":
        raise ValidationError(value)
    name, detail, errors = value
    raise getattr(service_errors, name)(detail, errors)
