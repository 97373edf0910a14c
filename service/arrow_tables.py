"""CSV, Arrow IPC stream and Parquet bodies → :class:`~service.tables.Table`, with pyarrow.

The readers check the size caps before they materialise a table where the format
allows it (Parquet's footer gives rows × columns; an Arrow stream is counted batch
by batch), so a small compressed body cannot unpack into an unbounded matrix.

In these formats a null, an empty CSV cell and a floating-point NaN are missing values
(pandas writes missing numbers as NaN); infinities are refused.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv
import pyarrow.ipc as pa_ipc
import pyarrow.parquet as pq

from service.errors import MalformedRequest
from service.tables import Table, check_size
from service.tables import field_error as _bad

CSV = "text/csv"
ARROW_STREAM = "application/vnd.apache.arrow.stream"
PARQUET = "application/vnd.apache.parquet"
FORMATS = (CSV, ARROW_STREAM, PARQUET)


def read(raw: bytes, media_type: str, max_records: int | None,
         max_bytes: int | None) -> pa.Table:
    """The body as a pyarrow table; 400 when it is not the format it says."""
    what = {CSV: "CSV", ARROW_STREAM: "an Arrow IPC stream", PARQUET: "Parquet"}[media_type]
    try:
        if media_type == CSV:
            table = pa_csv.read_csv(
                pa.BufferReader(raw),
                convert_options=pa_csv.ConvertOptions(strings_can_be_null=True))
            check_size(table.num_rows, table.num_columns, "body", max_records, max_bytes)
        elif media_type == ARROW_STREAM:
            reader = pa_ipc.open_stream(pa.BufferReader(raw))
            width, rows, batches = len(reader.schema), 0, []
            for batch in reader:  # counted as it unpacks: refused before it all is
                rows += batch.num_rows
                check_size(rows, width, "body", max_records, max_bytes)
                batches.append(batch)
            table = pa.Table.from_batches(batches, schema=reader.schema)
        else:
            source = pq.ParquetFile(pa.BufferReader(raw))
            meta = source.metadata
            check_size(meta.num_rows, meta.num_columns, "body", max_records, max_bytes)
            table = source.read()
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, OSError) as exc:
        raise MalformedRequest(f"The body is not valid {what}: {exc}") from exc
    if table.num_rows == 0:
        raise _bad("body", "the table has no rows")
    names = table.column_names
    if not all(names):
        raise _bad("columns", "column names must be non-empty")
    if len(set(names)) != len(names):
        raise _bad("columns", "contains duplicate names")
    return table


def take_groups(table: pa.Table, column: str) -> tuple[pa.Table, list[Any]]:
    """Split off the group column: its labels (strings or whole numbers, no nulls)."""
    if column not in table.column_names:
        raise _bad("group_column", f"the table has no column {column!r}")
    col = table.column(column).combine_chunks()
    if pa.types.is_dictionary(col.type):
        col = col.dictionary_decode()
    if not (pa.types.is_integer(col.type) or pa.types.is_string(col.type)
            or pa.types.is_large_string(col.type)):
        raise _bad(column, f"group labels must be strings or whole numbers, not {col.type}")
    if col.null_count:
        i = int(np.argmax(col.is_null().to_numpy(zero_copy_only=False)))
        raise _bad(column, f"row {i}: no group label", row=i)
    return table.drop_columns([column]), col.to_pylist()


def _is_numeric(t: pa.DataType) -> bool:
    return pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)


def to_table(table: pa.Table) -> Table:
    """A pyarrow table → a Table: numeric columns as float64, others as text."""
    names = tuple(table.column_names)
    n, c = table.num_rows, table.num_columns
    numbers = np.full((n, c), np.nan)
    missing = np.zeros((n, c), dtype=bool)
    text: dict[int, np.ndarray] = {}
    for j, col in enumerate(table.columns):
        col = col.combine_chunks()
        if pa.types.is_dictionary(col.type):
            col = col.dictionary_decode()
        if _is_numeric(col.type):
            values = pc.cast(col, pa.float64()).to_numpy(zero_copy_only=False)
            holes = np.isnan(values)  # nulls arrive as NaN; NaN itself is missing too
            infinite = np.isinf(values)
            if infinite.any():
                i = int(np.argmax(infinite))
                raise _bad(names[j], f"row {i}: values must be finite numbers", row=i)
            numbers[:, j] = values
            missing[:, j] = holes
        else:
            values = _text(col)
            text[j] = np.array(values, dtype=object)
            missing[:, j] = [v is None for v in values]

    def raw(j: int) -> list[Any]:
        col = table.column(j)
        if _is_numeric(col.type):
            return [None if isinstance(v, float) and v != v else v for v in col.to_pylist()]
        return _text(col.combine_chunks())

    return Table(names, numbers, missing if missing.any() else None, text, "tabular", raw)


def _text(col: pa.Array) -> list[Any]:
    """Values of a non-numeric column: strings (dates and times in ISO form), booleans."""
    if pa.types.is_dictionary(col.type):
        col = col.dictionary_decode()
    if pa.types.is_boolean(col.type) or pa.types.is_string(col.type) or \
            pa.types.is_large_string(col.type):
        return col.to_pylist()
    try:
        return pc.cast(col, pa.string()).to_pylist()
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return [None if v is None else str(v) for v in col.to_pylist()]


def stream(columns: dict[str, Any]) -> bytes:
    """Columns (name → numpy array or list) as one Arrow IPC stream; a list of mixed
    types (ids as posted: strings, numbers, booleans) goes as text."""
    arrays = {}
    for name, values in columns.items():
        try:
            arrays[name] = pa.array(values)
        except (pa.ArrowInvalid, pa.ArrowTypeError):
            arrays[name] = pa.array([None if v is None else str(v) for v in values])
    table = pa.table(arrays)
    sink = pa.BufferOutputStream()
    with pa_ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()
