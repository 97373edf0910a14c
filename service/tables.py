"""Tables posted by clients → float64 matrices in the metric's feature order.

Two shapes are accepted::

    {"records": [{"feature": number, ...}, ...]}
    {"columns": ["feature", ...], "rows": [[number, ...], ...]}

Columns may come in any order but must be exactly the metric's features. Checks are
vectorised (``map``/``itemgetter`` at C speed, numpy for numbers); the slow per-row
scan runs only to name the first offending row in an error. Errors are
:class:`InvalidInput` with fields ``records``, ``records[i]``, ``columns``, ``rows``,
``rows[i]``, ``groups``; a table over the size cap is :class:`PayloadTooLarge`.
"""

from __future__ import annotations

from collections.abc import Sequence
from itertools import chain
from operator import itemgetter
from typing import Any

import numpy as np

from service.errors import InvalidInput, PayloadTooLarge

_NUMBER_TYPES = {int, float}
MAX_LABEL_LENGTH = 200
MAX_INT_LABEL = 2**53 - 1  # the largest whole number every JSON reader keeps exactly


def _bad(field: str, message: str) -> InvalidInput:
    return InvalidInput.field(field, message, f"{field}: {message}")


def _first(items: Sequence[Any], predicate: Any) -> int:
    return next((i for i, item in enumerate(items) if predicate(item)), 0)


def _numbers(rows: list[Sequence[Any]], field: str, n_cols: int) -> np.ndarray:
    """Rows of JSON numbers → float64 matrix; bools, strings and nulls are refused."""
    types = set(map(type, chain.from_iterable(rows)))
    if not types <= _NUMBER_TYPES:
        i = _first(rows, lambda r: any(type(v) not in _NUMBER_TYPES for v in r))
        raise _bad(f"{field}[{i}]", "values must be numbers (not strings, booleans or null)")
    try:
        X = np.array(rows, dtype=float)
    except (OverflowError, ValueError) as exc:
        raise _bad(field, f"not a matrix of numbers ({exc})") from exc
    X = X.reshape(len(rows), n_cols)
    finite = np.isfinite(X).all(axis=1)
    if not finite.all():
        raise _bad(f"{field}[{int(np.argmin(finite))}]", "values must be finite numbers")
    return X


def _check_size(n: int, d: int, field: str, max_records: int | None,
                max_bytes: int | None) -> None:
    if max_records is not None and n > max_records:
        raise PayloadTooLarge(
            f"{n} records exceed the limit of {max_records} per request",
            [{"field": field, "message": f"at most {max_records} records"}])
    if max_bytes is not None and n * d * 8 > max_bytes:
        raise PayloadTooLarge(
            f"{n}×{d} numbers exceed the limit of {max_bytes // 8} per batch",
            [{"field": field, "message": f"at most {max_bytes // 8} numbers"}])


def _from_records(features: list[str], records: Any) -> np.ndarray:
    if not isinstance(records, list) or not records:
        raise _bad("records", "must be a non-empty list of objects")
    d = len(features)
    getter = itemgetter(*features)
    try:
        rows = list(map(getter, records))
        lengths = np.fromiter(map(len, records), dtype=np.int64, count=len(records))
    except (KeyError, TypeError, IndexError):
        i = _first(records, lambda r: not isinstance(r, dict) or set(r) != set(features))
        raise _bad(f"records[{i}]", _record_problem(records[i], features)) from None
    if (lengths != d).any():
        i = int(np.argmax(lengths != d))
        raise _bad(f"records[{i}]", _record_problem(records[i], features))
    if d == 1:
        rows = [(v,) for v in rows]
    return _numbers(rows, "records", d)


def _record_problem(record: Any, features: list[str]) -> str:
    if not isinstance(record, dict):
        return "each record must be an object of feature: number"
    missing = [f for f in features if f not in record]
    extra = sorted(set(record) - set(features))
    parts = []
    if missing:
        parts.append("missing " + ", ".join(missing))
    if extra:
        parts.append("unknown " + ", ".join(map(str, extra)))
    return "; ".join(parts) or "keys must be exactly the metric's features"


def _from_columns(features: list[str], columns: Any, rows: Any) -> np.ndarray:
    if not isinstance(columns, list) or not all(isinstance(c, str) for c in columns):
        raise _bad("columns", "must be a list of feature names")
    if len(set(columns)) != len(columns):
        raise _bad("columns", "contains duplicate names")
    if set(columns) != set(features):
        missing = [f for f in features if f not in columns]
        extra = [c for c in columns if c not in features]
        msg = "; ".join(p for p in (
            "missing " + ", ".join(missing) if missing else "",
            "unknown " + ", ".join(extra) if extra else "") if p)
        raise _bad("columns", f"must be exactly the metric's features ({msg})")
    if not isinstance(rows, list) or not rows:
        raise _bad("rows", "must be a non-empty list of lists")
    d = len(columns)
    try:
        lengths = np.fromiter(map(len, rows), dtype=np.int64, count=len(rows))
        ok_types = all(map(list.__instancecheck__, rows))
    except TypeError:
        lengths, ok_types = None, False
    if not ok_types or lengths is None or (lengths != d).any():
        i = _first(rows, lambda r: not isinstance(r, list) or len(r) != d)
        raise _bad(f"rows[{i}]", f"each row must be a list of {d} numbers")
    X = _numbers(rows, "rows", d)
    order = [columns.index(f) for f in features]
    return X[:, order]


def to_matrix(
    features: list[str],
    table: dict[str, Any],
    max_records: int | None = None,
    max_bytes: int | None = None,
) -> np.ndarray:
    """The table as an ``n × len(features)`` float64 matrix in ``features`` order."""
    if not isinstance(table, dict):
        raise _bad("records", "give either records or columns and rows")
    has_records = "records" in table
    has_columns = "columns" in table or "rows" in table
    if has_records == has_columns:
        raise _bad("records", "give either records or columns and rows (not both, not neither)")
    if has_records:
        records = table["records"]
        n = len(records) if isinstance(records, list) else 0
        _check_size(n, len(features), "records", max_records, max_bytes)
        return _from_records(features, records)
    if "columns" not in table:
        raise _bad("columns", "required with rows")
    if "rows" not in table:
        raise _bad("rows", "required with columns")
    rows = table["rows"]
    n = len(rows) if isinstance(rows, list) else 0
    _check_size(n, len(features), "rows", max_records, max_bytes)
    return _from_columns(features, table["columns"], rows)


def check_groups(groups: Any, n_records: int) -> list[Any]:
    """Group labels: one per record, all strings or all whole numbers, ≥ 2 distinct."""
    if not isinstance(groups, list):
        raise _bad("groups", "must be a list with one label per record")
    if len(groups) != n_records:
        raise _bad("groups", f"has {len(groups)} label(s) for {n_records} record(s)")
    types = set(map(type, groups))
    if types == {str}:
        if max(map(len, groups)) > MAX_LABEL_LENGTH:
            raise _bad("groups", f"labels are at most {MAX_LABEL_LENGTH} characters")
    elif types != {int}:
        raise _bad("groups", "labels must be all strings or all whole numbers")
    elif max(groups) > MAX_INT_LABEL or min(groups) < -MAX_INT_LABEL:
        raise _bad("groups", f"whole-number labels are at most {MAX_INT_LABEL} in size "
                             "(use string labels for longer identifiers)")
    if len(set(groups)) < 2:
        raise _bad("groups", "a batch needs at least two groups")
    return groups
