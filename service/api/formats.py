"""Bodies that carry a table — JSON, CSV, Arrow IPC stream, Parquet — read once into a
:class:`~service.tables.Table` with the request's options.

- JSON: the envelope (``records`` or ``columns`` + ``rows``, and ``groups`` / ``k`` /
  ``version``) is checked by its marshmallow schema, the table by ``service.tables``.
- CSV (with a header row), Arrow IPC stream and Parquet are read by pyarrow; a batch
  names its group column with ``?group_column=``, a grouping takes ``k`` and
  ``version`` from the query.
- Options common to every format ride in the query string (``ignore_extra_columns``,
  ``allow_duplicate``, ``id_column``).

Any other content type is a 415. Size caps are those of the JSON forms (a grouping
run passes its own, larger ones).
"""

from __future__ import annotations

from typing import Any

from flask import request
from marshmallow import Schema

from service import arrow_tables
from service.errors import InvalidInput, UnsupportedMediaType
from service.tables import Table

from .bodies import body
from .deps import context
from .offload import read_json_table
from .schemas import query_args

JSON = "application/json"
MEDIA_TYPES = (JSON, *arrow_tables.FORMATS)  # a batch also takes batch_stats.MEDIA_TYPE


def _caps() -> tuple[int, int]:
    s = context().settings
    return s.max_batch_records, s.max_batch_bytes


def read_table(kind: str, query_schema: Schema, *, tabular_only: tuple[str, ...] = (),
               also_accepted: tuple[str, ...] = (),
               caps: tuple[int, int] | None = None) -> tuple[Table, dict[str, Any]]:
    """The request's table and its options (the JSON envelope's fields, then the query's)
    for a ``kind`` of body: ``"batch"`` or ``"grouping"``.

    ``tabular_only`` names query options that only the tabular formats take (a JSON
    body carries them in its envelope). ``also_accepted`` lists other content types the
    endpoint reads elsewhere, for the 415's message. ``caps`` (records, raw float64
    bytes) replace the batch caps (a grouping run's are larger).
    """
    query = query_args(query_schema)
    media = request.mimetype
    max_records, max_bytes = caps or _caps()
    if request.is_json:
        for name in tabular_only:
            if name in query:
                raise InvalidInput.field(
                    name, "give it in the JSON body (the query takes it for CSV, Arrow "
                          "and Parquet bodies only)")
        keep = (query["id_column"],) if query.get("id_column") else ()
        table, envelope = read_json_table(body(), kind,
                                          (max_records, max_bytes), keep)
        return table, {**query, **envelope}
    if media not in arrow_tables.FORMATS:
        raise UnsupportedMediaType(
            f"Expected one of {', '.join((*MEDIA_TYPES, *also_accepted))}, got "
            f"{media or 'no content type'}.")
    if "group_column" in query_schema.fields and "group_column" not in query:
        raise InvalidInput.field(
            "group_column", f"required with a {media} body: the column of group labels")
    raw = body()
    pa_table = arrow_tables.read(raw, media, max_records, max_bytes)
    if "group_column" in query:
        pa_table, groups = arrow_tables.take_groups(pa_table, query["group_column"])
        return arrow_tables.to_table(pa_table).with_groups(groups, query["group_column"]), query
    return arrow_tables.to_table(pa_table), query
