"""Tables in, request bodies out.

Whatever the caller holds — a list of dicts, a numpy array with column names (or a
structured array), a pandas DataFrame — is first turned into one :class:`Table`
(column names + a float64 matrix). A :class:`BodyFormat` then encodes a table and the
request's other members for one content type, and says which of them ride in the
query string. Registered: JSON (``columns`` + ``rows``) and the Arrow IPC stream
(:data:`ARROW`; the labels and an id column are columns of the stream, ``k`` and
``version`` go in the query). Callers choose by content type.

pandas and pyarrow are never imported here until needed: a DataFrame (or an Arrow
table) is recognised only when its library is already loaded (the caller imported it
to build one), and pyarrow is imported when an Arrow body is encoded.
"""

from __future__ import annotations

import json
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

JSON = "application/json"
ARROW = "application/vnd.apache.arrow.stream"


@dataclass(frozen=True)
class Table:
    columns: list[str]
    values: np.ndarray  # (records, columns), float64

    def __len__(self) -> int:
        return int(self.values.shape[0])


def _is_frame(data: Any) -> bool:
    pandas = sys.modules.get("pandas")
    return pandas is not None and isinstance(data, pandas.DataFrame)


def _is_arrow(data: Any) -> bool:
    pyarrow = sys.modules.get("pyarrow")
    return pyarrow is not None and isinstance(data, pyarrow.Table)


def split_groups(data: Any, groups: Any) -> tuple[Any, list[Any]]:
    """``groups`` as a list of labels; a string names a column of ``data`` that holds
    them (that column is then left out of the features)."""
    if isinstance(groups, str):
        if _is_frame(data):
            return data.drop(columns=[groups]), data[groups].tolist()
        if _is_arrow(data):
            return data.drop_columns([groups]), data.column(groups).to_pylist()
        if isinstance(data, Sequence) and data and isinstance(data[0], Mapping):
            labels = [record[groups] for record in data]
            return [{k: v for k, v in r.items() if k != groups} for r in data], labels
        raise TypeError("groups as a column name needs a DataFrame or a list of dicts")
    return data, np.asarray(groups).tolist()


def to_table(data: Any, columns: Sequence[str] | None = None) -> Table:
    """One table from a DataFrame, an Arrow table or a list of dicts (``columns`` picks
    and orders their columns), or from an array (``columns`` names them; a structured
    array names its own)."""
    if _is_arrow(data):
        names = [str(c) for c in (columns or data.column_names)]
        values = np.column_stack([
            data.column(c).to_numpy(zero_copy_only=False).astype(np.float64)
            for c in names]) if names else np.zeros((data.num_rows, 0))
    elif _is_frame(data):
        if columns is not None:
            data = data[list(columns)]
        names = [str(c) for c in data.columns]
        values = data.to_numpy(dtype=np.float64)
    elif isinstance(data, np.ndarray) and data.dtype.names:
        names = list(columns or data.dtype.names)
        values = np.column_stack([data[n].astype(np.float64) for n in names])
    elif isinstance(data, Sequence) and len(data) and isinstance(data[0], Mapping):
        names = [str(c) for c in (columns or data[0])]
        try:
            values = np.array([[record[c] for c in names] for record in data],
                              dtype=np.float64)
        except KeyError as exc:
            raise ValueError(f"a record has no {exc.args[0]!r}") from None
    else:
        if columns is None:
            raise TypeError("an array needs its column names: pass columns=[...]")
        names = [str(c) for c in columns]
        values = np.asarray(data, dtype=np.float64)
    if values.ndim != 2 or values.shape[1] != len(names):
        raise ValueError(f"expected a 2-D table with {len(names)} columns, got shape "
                         f"{values.shape}")
    bad = np.argwhere(~np.isfinite(values))
    if len(bad):
        row, col = (int(v) for v in bad[0])
        raise ValueError(f"row {row}, column {names[col]!r}: {values[row, col]} is not a "
                         "finite number (the service refuses missing values)")
    return Table(names, values)


class BodyFormat(Protocol):
    content_type: str

    def encode(self, table: Table, members: Mapping[str, Any]
               ) -> tuple[bytes, dict[str, str]]:
        """The request body and query: the table plus the request's other members
        (``groups``, ``k``, ``version``, ``ids`` = (column name, values) …)."""
        ...


class JsonColumnsRows:
    """``{"columns": [...], "rows": [[...], ...], **members}``; an id column rides as
    one more column (its values as they are), named in ``?id_column=``."""

    content_type = JSON

    def encode(self, table: Table, members: Mapping[str, Any]
               ) -> tuple[bytes, dict[str, str]]:
        members = dict(members)
        query: dict[str, str] = {}
        columns, rows = table.columns, table.values.tolist()
        if "ids" in members:
            name, ids = members.pop("ids")
            columns = [*columns, name]
            rows = [[*row, i] for row, i in zip(rows, ids, strict=True)]
            query["id_column"] = name
        body = {"columns": columns, "rows": rows, **members}
        return json.dumps(body, allow_nan=False, separators=(",", ":")).encode(), query


def _free_name(base: str, taken: Sequence[str]) -> str:
    name = base
    while name in taken:
        name += "_"
    return name


class ArrowStream:
    """An Arrow IPC stream of the table's columns (float64), the labels as one more
    column (named in ``?group_column=``) and an id column (``?id_column=``); ``k`` and
    ``version`` in the query. pyarrow is imported on first use."""

    content_type = ARROW

    def encode(self, table: Table, members: Mapping[str, Any]
               ) -> tuple[bytes, dict[str, str]]:
        import pyarrow as pa

        arrays = {c: pa.array(table.values[:, j]) for j, c in enumerate(table.columns)}
        query: dict[str, str] = {}
        if "groups" in members:
            name = _free_name("likewise_group", table.columns)
            arrays[name] = pa.array(list(members["groups"]))
            query["group_column"] = name
        if "ids" in members:
            name, ids = members["ids"]
            arrays[name] = pa.array(list(ids))
            query["id_column"] = name
        for key in ("k", "version"):
            if members.get(key) is not None:
                query[key] = str(members[key])
        sink = pa.BufferOutputStream()
        arrow_table = pa.table(arrays)
        with pa.ipc.new_stream(sink, arrow_table.schema) as writer:
            writer.write_table(arrow_table)
        return sink.getvalue().to_pybytes(), query


FORMATS: dict[str, BodyFormat] = {JSON: JsonColumnsRows(), ARROW: ArrowStream()}


def encode(table: Table, members: Mapping[str, Any], content_type: str = JSON
           ) -> tuple[bytes, dict[str, str]]:
    """The body and the query parameters that go with it."""
    try:
        body_format = FORMATS[content_type]
    except KeyError:
        raise ValueError(f"no body format for {content_type!r}; known: "
                         f"{sorted(FORMATS)}") from None
    return body_format.encode(table, members)
