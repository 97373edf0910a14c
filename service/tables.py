"""Tables posted by clients, parsed once at the API edge into one type: :class:`Table`.

A Table holds column names, a float64 matrix of their numeric values, which values
are missing, the raw values of columns that hold text, and — for a batch — the group
labels. Use cases take a Table and ask it for the matrix of a metric's features
(:meth:`Table.matrix`); they never see the body's format. Constructors:

- :func:`from_json` — a JSON envelope's ``records`` (objects keyed by column) or
  ``columns`` + ``rows``;
- :func:`service.arrow_tables.from_arrow` — a pyarrow table, read from CSV, an Arrow
  IPC stream or Parquet.

Checks are vectorised (``map``/``itemgetter`` at C speed, numpy for numbers); a slow
per-row scan runs only to name the first offending row. Errors are
:class:`InvalidInput` naming where: ``records[i]``, ``rows[i]``, ``columns``,
``groups`` for JSON; for the tabular formats the column's name, with the row number
in the message and in the error's ``row``. A table over the size caps is
:class:`PayloadTooLarge`.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from itertools import chain
from operator import itemgetter
from typing import Any, Literal

import numpy as np

from service.errors import InvalidInput, PayloadTooLarge

_NUMBER_TYPES = {int, float}
_CELL_TYPES = {int, float, str, type(None)}
MAX_LABEL_LENGTH = 200
MAX_INT_LABEL = 2**53 - 1  # the largest whole number every JSON reader keeps exactly
LEVEL_SEPARATOR = "="  # a categorical feature's level column: "carrier=north"

Kind = Literal["records", "rows", "tabular"]


def field_error(field_name: str, message: str, row: int | None = None) -> InvalidInput:
    """A 422 naming ``field_name`` (and the row of a tabular body, when given)."""
    error: dict[str, Any] = {"field": field_name, "message": message}
    if row is not None:
        error["row"] = row
    return InvalidInput(f"{field_name}: {message}", [error])


_bad = field_error


def _first(items: Sequence[Any], predicate: Callable[[Any], bool]) -> int:
    return next((i for i, item in enumerate(items) if predicate(item)), 0)


def check_size(n: int, width: int, field_name: str, max_records: int | None,
               max_bytes: int | None) -> None:
    """Refuse (413) a table of ``n`` rows × ``width`` numbers over the caps."""
    if max_records is not None and n > max_records:
        raise PayloadTooLarge(
            f"{n} records exceed the limit of {max_records} per request",
            [{"field": field_name, "message": f"at most {max_records} records"}])
    if max_bytes is not None and n * width * 8 > max_bytes:
        raise PayloadTooLarge(
            f"{n}×{width} numbers exceed the limit of {max_bytes // 8} per request",
            [{"field": field_name, "message": f"at most {max_bytes // 8} numbers"}])


def encoded_names(features: Sequence[str], categories: dict[str, list[str]] | None
                  ) -> list[str]:
    """The matrix's column names: a numeric feature as is, a categorical one as one
    column per level (``name=level``), in the metric's order."""
    categories = categories or {}
    out: list[str] = []
    for f in features:
        if f in categories:
            out.extend(f"{f}{LEVEL_SEPARATOR}{level}" for level in categories[f])
        else:
            out.append(f)
    return out


@dataclass(frozen=True)
class Matrix:
    """What :meth:`Table.matrix` gives: the numbers, and how many values it filled in."""

    X: np.ndarray
    imputed: int = 0
    imputed_by_feature: dict[str, int] = field(default_factory=dict)


@dataclass(frozen=True)
class Table:
    """One posted table. ``numbers`` is n × len(names), NaN where a value is missing
    (``missing``) or is text (``text`` holds those columns' raw values)."""

    names: tuple[str, ...]
    numbers: np.ndarray
    missing: np.ndarray | None
    text: dict[int, np.ndarray]
    kind: Kind
    raw_column: Callable[[int], list[Any]]
    groups: list[Any] | None = None
    group_field: str = "groups"

    @property
    def n_rows(self) -> int:
        return int(self.numbers.shape[0])

    @property
    def field(self) -> str:
        """The field a problem about the whole table names."""
        return {"records": "records", "rows": "rows", "tabular": "body"}[self.kind]

    def row_field(self, i: int, j: int | None = None) -> str:
        if self.kind == "tabular":
            return self.names[j] if j is not None else "body"
        return f"{self.kind}[{i}]"

    def cell_error(self, i: int, j: int, message: str) -> InvalidInput:
        if self.kind == "tabular":
            return _bad(self.names[j], f"row {i}: {message}", row=i)
        return _bad(f"{self.kind}[{i}]", message)

    def with_groups(self, groups: list[Any], group_field: str = "groups") -> Table:
        return Table(self.names, self.numbers, self.missing, self.text, self.kind,
                     self.raw_column, groups, group_field)

    def portable(self, keep: Sequence[str] = ()) -> Table:
        """This table with the raw values of only the ``keep`` columns (the others'
        are gone), safe to pickle to another process."""
        kept = {j: self.raw_column(j) for j, n in enumerate(self.names) if n in keep}
        return Table(self.names, self.numbers, self.missing, self.text, self.kind,
                     _Kept(kept), self.groups, self.group_field)

    def column_values(self, name: str) -> list[Any]:
        """A column's values as posted (JSON-safe), e.g. an id column to echo back."""
        if name not in self.names:
            raise _bad("id_column", f"the table has no column {name!r}")
        return self.raw_column(self.names.index(name))

    # -- the metric's view of the table --------------------------------------------

    def _column_error(self, features: Sequence[str], ignore_extra: bool,
                      allowed: Sequence[str]) -> InvalidInput | None:
        missing = [f for f in features if f not in self.names]
        extra = [] if ignore_extra else [
            c for c in self.names if c not in features and c not in allowed]
        if not missing and not extra:
            return None
        parts = []
        if missing:
            parts.append("missing " + ", ".join(missing))
        if extra:
            parts.append("unknown " + ", ".join(map(str, extra)))
        message = "; ".join(parts)
        if self.kind == "records":
            if not missing and self.missing is not None:
                # name the first record that carries an unknown key
                j = self.names.index(extra[0])
                i = int(np.argmin(self.missing[:, j]))
                return _bad(f"records[{i}]", message)
            return _bad("records[0]", message)
        hint = " (or ask to ignore extra columns)" if extra else ""
        return _bad("columns", f"must be the metric's features ({message}){hint}")

    def matrix(
        self,
        features: Sequence[str],
        *,
        ignore_extra: bool = False,
        fill: np.ndarray | Literal["own"] | None = None,
        categories: dict[str, list[str]] | None = None,
        allowed: Sequence[str] = (),
    ) -> Matrix:
        """The ``n × len(encoded_names(features, categories))`` float64 matrix.

        - Columns not among ``features`` are refused unless ``ignore_extra`` (or
          they are ``allowed``, e.g. an id column to echo).
        - Missing values are refused when ``fill`` is None; ``fill`` is either the
          value per encoded column (a version's training means) or ``"own"``: each
          numeric column's mean over the table's rows that have a value.
        - A categorical feature (``categories[name]`` lists its levels) becomes one
          0/1 column per level; a value outside the levels, or a missing one, is refused.
        """
        categories = categories or {}
        error = self._column_error(features, ignore_extra, allowed)
        if error is not None:
            raise error
        index = [self.names.index(f) for f in features]
        plain = (not categories.keys() & set(features) and not self.text.keys() & set(index)
                 and (self.missing is None or not self.missing[:, index].any()))
        if plain:  # the common case: numbers only, nothing to fill — one gather
            if index == list(range(self.numbers.shape[1])):
                return Matrix(np.ascontiguousarray(self.numbers))  # already in order
            return Matrix(np.ascontiguousarray(self.numbers[:, index]))
        blocks: list[np.ndarray] = []
        imputed: dict[str, int] = {}
        out_col = 0
        for f, j in zip(features, index, strict=True):
            if f in categories:
                blocks.append(self._one_hot(j, categories[f]))
                out_col += len(categories[f])
                continue
            if j in self.text:
                raise self._not_numbers(j, f)
            col = self.numbers[:, j]
            holes = self.missing[:, j] if self.missing is not None else None
            if holes is not None and holes.any():
                if fill is None:
                    i = int(np.argmax(holes))
                    raise self.cell_error(
                        i, j, f"no value for {f!r} (the metric refuses missing values)")
                if isinstance(fill, str):
                    if holes.all():
                        raise _bad(self.row_field(0, j),
                                   f"{f!r} has no value in any row: nothing to fill in from")
                    value = float(col[~holes].mean())
                else:
                    value = float(fill[out_col])
                col = np.where(holes, value, col)
                imputed[f] = int(holes.sum())
            blocks.append(col[:, None])
            out_col += 1
        X = np.hstack(blocks) if len(blocks) > 1 else blocks[0].reshape(self.n_rows, -1)
        return Matrix(np.ascontiguousarray(X, dtype=float), sum(imputed.values()), imputed)

    def _not_numbers(self, j: int, name: str) -> InvalidInput:
        """A feature column that holds text: name its first cell that is not a number
        (in a CSV column most cells may be number-like text around one bad one)."""
        values = self.text[j]
        i = _first(values, lambda v: v is not None and not _is_number(v)
                   and not (self.kind == "tabular" and _number_like(v)))
        return self.cell_error(i, j, f"{name!r} must be a number, got {values[i]!r}")

    def _one_hot(self, j: int, levels: list[str]) -> np.ndarray:
        name = self.names[j]
        values = self.text.get(j)
        if values is None:
            # a categorical column posted as numbers: refuse (levels are text)
            holes = self.missing[:, j] if self.missing is not None else None
            i = int(np.argmin(holes)) if holes is not None else 0
            raise self.cell_error(i, j, f"{name!r} takes one of its levels ({', '.join(levels)})")
        lookup = {level: k for k, level in enumerate(levels)}
        codes = np.fromiter((lookup.get(v, -1) if isinstance(v, str) else -1 for v in values),
                            dtype=np.int64, count=len(values))
        if (codes < 0).any():
            i = int(np.argmax(codes < 0))
            v = values[i]
            what = "no value" if v is None else f"unknown level {v!r}"
            raise self.cell_error(i, j, f"{what} for {name!r} (levels: {', '.join(levels)})")
        out = np.zeros((len(values), len(levels)))
        out[np.arange(len(values)), codes] = 1.0
        return out


def _is_number(v: Any) -> bool:
    return type(v) in _NUMBER_TYPES


def _number_like(v: Any) -> bool:
    try:
        float(v)
    except (TypeError, ValueError):
        return False
    return True


# -- JSON ----------------------------------------------------------------------------


def _cells(rows: list[Sequence[Any]], kind: Kind, names: tuple[str, ...],
           raw: Callable[[int], list[Any]]) -> Table:
    """Rows of JSON cells (numbers, strings, null; ``_ABSENT`` for a key a record
    lacks) → a Table. The common case — all numbers — is one numpy conversion."""
    n, c = len(rows), len(names)
    types = set(map(type, chain.from_iterable(rows)))
    if types <= _NUMBER_TYPES:
        numbers = _to_floats(rows, kind, n, c)
        return Table(names, numbers, None, {}, kind, raw)
    if not types <= _CELL_TYPES | {_Absent}:
        i = _first(rows, lambda r: any(type(v) not in _CELL_TYPES | {_Absent} for v in r))
        raise _bad(f"{kind}[{i}]", "values must be numbers, strings or null "
                                   "(not booleans, lists or objects)")
    columns = list(zip(*rows, strict=True))
    numbers = np.full((n, c), np.nan)
    missing = np.zeros((n, c), dtype=bool)
    text: dict[int, np.ndarray] = {}
    for j, values in enumerate(columns):
        kinds = set(map(type, values))
        if kinds <= _NUMBER_TYPES:
            numbers[:, j] = _to_floats([(v,) for v in values], kind, n, 1)[:, 0]
            continue
        holes = np.fromiter((v is None or v is _ABSENT for v in values), dtype=bool, count=n)
        missing[:, j] = holes
        if kinds & {str}:
            text[j] = np.array([None if v is _ABSENT else v for v in values], dtype=object)
            continue
        present = [(v,) for v in values if v is not None and v is not _ABSENT]
        if present:
            numbers[~holes, j] = _to_floats(present, kind, len(present), 1,
                                            where=np.flatnonzero(~holes))[:, 0]
    return Table(names, numbers, missing if missing.any() else None, text, kind, raw)


def _to_floats(rows: list[Sequence[Any]], kind: Kind, n: int, c: int,
               where: np.ndarray | None = None) -> np.ndarray:
    try:
        X = np.array(rows, dtype=float).reshape(n, c)
    except (OverflowError, ValueError) as exc:
        raise _bad(kind, f"not a matrix of numbers ({exc})") from exc
    return _finite(X, kind, where)


def _finite(X: np.ndarray, kind: Kind, where: np.ndarray | None = None) -> np.ndarray:
    """``X``, or a 422 naming its first row with NaN or infinity (``where``: the rows'
    numbers in the table, when ``X`` holds only some of them)."""
    finite = np.isfinite(X).all(axis=1)
    if not finite.all():
        i = int(np.argmin(finite))
        raise _bad(f"{kind}[{int(where[i]) if where is not None else i}]",
                   "values must be finite numbers")
    return X


class _Kept:
    """Raw values of the columns a portable table kept."""

    def __init__(self, columns: dict[int, list[Any]]) -> None:
        self.columns = columns

    def __call__(self, j: int) -> list[Any]:
        return self.columns[j]


class _Absent:
    """A key that a record lacks (a missing value, like null)."""

    __slots__ = ()

    def __repr__(self) -> str:
        return "absent"


_ABSENT = _Absent()


def _from_records(records: list[Any]) -> Table:
    if not all(map(dict.__instancecheck__, records)):
        i = _first(records, lambda r: not isinstance(r, dict))
        raise _bad(f"records[{i}]", "each record must be an object of column: value")
    first = list(records[0])
    if not first:
        raise _bad("records[0]", "a record needs at least one value")
    getter = itemgetter(*first)
    try:
        rows = list(map(getter, records))
        lengths = np.fromiter(map(len, records), dtype=np.int64, count=len(records))
        regular = not (lengths != len(first)).any()
    except KeyError:
        regular = False
    if regular:
        names = tuple(first)
        if len(names) == 1:
            rows = [(v,) for v in rows]
    else:
        # records with different keys: the union of keys, a lacking key is missing
        names = tuple(dict.fromkeys(chain.from_iterable(records)))
        rows = [tuple(r.get(k, _ABSENT) for k in names) for r in records]
    _check_names(names, "records[0]")

    def raw(j: int) -> list[Any]:
        return [None if v is _ABSENT else v for v in (r[j] for r in rows)]

    return _cells(rows, "records", names, raw)


def _check_names(names: Sequence[Any], field_name: str) -> None:
    if not all(isinstance(c, str) and c for c in names):
        raise _bad(field_name, "column names must be non-empty strings")


def _check_columns(columns: list[Any]) -> None:
    _check_names(columns, "columns")
    if len(set(columns)) != len(columns):
        raise _bad("columns", "contains duplicate names")


def _from_rows(columns: list[Any], rows: list[Any]) -> Table:
    _check_columns(columns)
    c = len(columns)
    try:
        lengths = np.fromiter(map(len, rows), dtype=np.int64, count=len(rows))
        ok_types = all(map(list.__instancecheck__, rows))
    except TypeError:
        lengths, ok_types = None, False
    if not ok_types or lengths is None or (lengths != c).any():
        i = _first(rows, lambda r: not isinstance(r, list) or len(r) != c)
        raise _bad(f"rows[{i}]", f"each row must be a list of {c} values")

    def raw(j: int) -> list[Any]:
        return [r[j] for r in rows]

    return _cells(rows, "rows", tuple(columns), raw)


def from_number_rows(columns: list[Any], X: np.ndarray, max_records: int | None = None,
                     max_bytes: int | None = None) -> Table:
    """The table of a ``columns`` + ``rows`` envelope whose rows were read straight into
    the float64 matrix ``X`` (each row a list of ``len(columns)`` numbers, see
    ``service.api.jsonio.number_rows``): the checks and errors :func:`from_json` gives
    that envelope. No raw column values are kept (as a :meth:`Table.portable` table)."""
    if not isinstance(columns, list) or not columns:
        raise _bad("columns", "must be a list of column names")
    check_size(X.shape[0], len(columns), "rows", max_records, max_bytes)
    _check_columns(columns)
    return Table(tuple(columns), _finite(X, "rows"), None, {}, "rows", _Kept({}))


def from_json(body: dict[str, Any], max_records: int | None = None,
              max_bytes: int | None = None) -> Table:
    """The table of a JSON envelope (``records``, or ``columns`` and ``rows``)."""
    if not isinstance(body, dict):
        raise _bad("records", "give either records or columns and rows")
    has_records = "records" in body
    has_columns = "columns" in body or "rows" in body
    if has_records == has_columns:
        raise _bad("records", "give either records or columns and rows (not both, not neither)")
    if has_records:
        records = body["records"]
        if not isinstance(records, list) or not records:
            raise _bad("records", "must be a non-empty list of objects")
        first = records[0]
        width = len(first) if isinstance(first, dict) else 1
        check_size(len(records), width, "records", max_records, max_bytes)
        return _from_records(records)
    if "columns" not in body:
        raise _bad("columns", "required with rows")
    if "rows" not in body:
        raise _bad("rows", "required with columns")
    columns, rows = body["columns"], body["rows"]
    if not isinstance(columns, list) or not columns:
        raise _bad("columns", "must be a list of column names")
    if not isinstance(rows, list) or not rows:
        raise _bad("rows", "must be a non-empty list of lists")
    check_size(len(rows), len(columns), "rows", max_records, max_bytes)
    return _from_rows(columns, rows)


def check_groups(groups: Any, n_records: int, field_name: str = "groups") -> list[Any]:
    """Group labels: one per record, all strings or all whole numbers, ≥ 2 distinct."""
    if not isinstance(groups, list):
        raise _bad(field_name, "must be a list with one label per record")
    if len(groups) != n_records:
        raise _bad(field_name, f"has {len(groups)} label(s) for {n_records} record(s)")
    types = set(map(type, groups))
    if types == {str}:
        if max(map(len, groups)) > MAX_LABEL_LENGTH:
            raise _bad(field_name, f"labels are at most {MAX_LABEL_LENGTH} characters")
    elif types != {int}:
        raise _bad(field_name, "labels must be all strings or all whole numbers")
    elif max(groups) > MAX_INT_LABEL or min(groups) < -MAX_INT_LABEL:
        raise _bad(field_name, f"whole-number labels are at most {MAX_INT_LABEL} in size "
                               "(use string labels for longer identifiers)")
    if len(set(groups)) < 2:
        raise _bad(field_name, "a batch needs at least two groups")
    return groups
