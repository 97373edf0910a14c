"""Tables in, request bodies out.

Whatever the caller holds — a list of dicts, a numpy array with column names (or a
structured array), a pandas DataFrame — is first turned into one :class:`Table`
(column names + a float64 matrix). A :class:`BodyFormat` then encodes a table and the
request's other members for one content type. Only JSON (``columns`` + ``rows``) is
registered today; another format (Arrow, CSV) is one more entry in ``FORMATS``, and
callers choose it by content type without changing anything else.

pandas is never imported here: a DataFrame is recognised only when pandas is already
loaded (the caller imported it to build one).
"""

from __future__ import annotations

import json
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

JSON = "application/json"


@dataclass(frozen=True)
class Table:
    columns: list[str]
    values: np.ndarray  # (records, columns), float64

    def __len__(self) -> int:
        return int(self.values.shape[0])


def _is_frame(data: Any) -> bool:
    pandas = sys.modules.get("pandas")
    return pandas is not None and isinstance(data, pandas.DataFrame)


def split_groups(data: Any, groups: Any) -> tuple[Any, list[Any]]:
    """``groups`` as a list of labels; a string names a column of ``data`` that holds
    them (that column is then left out of the features)."""
    if isinstance(groups, str):
        if _is_frame(data):
            return data.drop(columns=[groups]), data[groups].tolist()
        if isinstance(data, Sequence) and data and isinstance(data[0], Mapping):
            labels = [record[groups] for record in data]
            return [{k: v for k, v in r.items() if k != groups} for r in data], labels
        raise TypeError("groups as a column name needs a DataFrame or a list of dicts")
    return data, np.asarray(groups).tolist()


def to_table(data: Any, columns: Sequence[str] | None = None) -> Table:
    """One table from a DataFrame or a list of dicts (``columns`` picks and orders
    their columns), or from an array (``columns`` names them; a structured array
    names its own)."""
    if _is_frame(data):
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

    def encode(self, table: Table, members: Mapping[str, Any]) -> bytes:
        """The request body: the table plus the request's other members (``groups``,
        ``k``, ``version`` …)."""
        ...


class JsonColumnsRows:
    """``{"columns": [...], "rows": [[...], ...], **members}``."""

    content_type = JSON

    def encode(self, table: Table, members: Mapping[str, Any]) -> bytes:
        body = {"columns": table.columns, "rows": table.values.tolist(), **members}
        return json.dumps(body, allow_nan=False, separators=(",", ":")).encode()


FORMATS: dict[str, BodyFormat] = {JSON: JsonColumnsRows()}


def encode(table: Table, members: Mapping[str, Any], content_type: str = JSON) -> bytes:
    try:
        body_format = FORMATS[content_type]
    except KeyError:
        raise ValueError(f"no body format for {content_type!r}; known: "
                         f"{sorted(FORMATS)}") from None
    return body_format.encode(table, members)
