"""The fast body parse (orjson, ``service.api.jsonio.decode_exact``) gives exactly what
the strict standard-library parse gives — the same value, or the same refusal.

Reference: Python's own ``json.loads`` with the duplicate-refusing hook, i.e.
``parse_json`` with the fast path switched off. Values are compared by type and, for
floats, bit for bit (so ``-0.0`` is not ``0.0``). Data: iris (Fisher 1936) as bundled
with scikit-learn for the API checks; the parser corpus is hand-written JSON text.
"""

from __future__ import annotations

import json
import random
import struct
from typing import Any

import numpy as np
import pytest

from service.api import bodies, jsonio
from service.errors import InvalidInput

from .helpers import IRIS_FEATURES, as_records, assert_problem, iris_batches, records_body
from .spec import SpecClient

ENVELOPE = frozenset({"records", "columns", "rows", "groups", "k", "version"})


def _strict(raw: bytes, monkeypatch: pytest.MonkeyPatch) -> Any:
    with monkeypatch.context() as m:
        m.setattr(bodies, "decode_exact", lambda raw: jsonio.UNSURE)
        return _outcome(raw)


def _outcome(raw: bytes) -> Any:
    """What parse_json gives: ("ok", value) or ("error", type, message, errors)."""
    try:
        return "ok", bodies.parse_json(raw, ENVELOPE)
    except InvalidInput as exc:
        return "error", "InvalidInput", exc.detail, exc.errors
    except (ValueError, RecursionError) as exc:
        return "error", type(exc).__name__


def _same(a: Any, b: Any) -> bool:
    if type(a) is not type(b):
        return False
    if isinstance(a, float):
        return struct.pack("<d", a) == struct.pack("<d", b) or (a != a and b != b)
    if isinstance(a, dict):
        return list(a) == list(b) and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    return a == b


def _check(raw: bytes, monkeypatch: pytest.MonkeyPatch) -> Any:
    fast, strict = _outcome(raw), _strict(raw, monkeypatch)
    assert _same(fast, strict), (raw[:200], fast, strict)
    return fast


NUMBERS = [
    "0", "-0", "-0.0", "0.0", "1e308", "-1e308", "1e309", "-1e309", "1E400", "5e-324",
    "2.2250738585072011e-308", "1e-400", "0.1", "0.30000000000000004441", "1.0E+2",
    "123456789012345678901234567890.5", "9007199254740993", "9223372036854775807",
    "9223372036854775808", "-9223372036854775808", "-9223372036854775809",
    "18446744073709551615", "18446744073709551616", "1" + "0" * 400, "-" + "9" * 30,
    "0.0012345678901234567890123", "1e-0000000000000000000001", "1e0000000000000000000002",
    "NaN", "Infinity", "-Infinity", "01", "1.", ".5", "+1", "-", "0x10", "1_0", "nan",
]

SHAPES = [
    '{{"columns": ["a", "b"], "rows": [[{n}, 1.5], [2, {n}]], "k": 2}}',
    '{{"records": [{{"a": {n}, "b": 1}}, {{"a": 2, "b": {n}}}], "groups": [{n}, 1]}}',
    '{{"columns": ["a"], "rows": [[1]], "k": {n}, "version": {n}}}',
    '{{"records": [{{"a": "x"}}], "groups": [{n}]}}',
]
# tables the number-table path reads (jsonio.number_rows), checked as whole tables
NUMBER_SHAPES = [
    '{{"columns": ["a", "b"], "rows": [[{n}, 1.5], [2, {n}]], "k": 2}}',
    '{{"columns": ["a", "b"], "rows": [[{n}, 1.5], [2, {n}]], "groups": [1, 2]}}',
    '{{"rows": [[{n}]], "columns": ["a"], "k": {n}, "version": {n}}}',
    '{{"columns": ["a", "b"], "rows": [[{n}, {n}]], "groups": [{n}, 1]}}',
]


@pytest.mark.parametrize("number", NUMBERS)
def test_numbers_parse_as_the_standard_library_parses_them(
        number: str, monkeypatch: pytest.MonkeyPatch) -> None:
    for shape in SHAPES:
        _check(shape.format(n=number).encode(), monkeypatch)
    for shape in NUMBER_SHAPES:  # and the tables read as the strict path reads them
        _check_table(shape.format(n=number).encode(), monkeypatch)


def _random_number_table(rng: random.Random, n_cells: int, largest: int,
                         lowest: int | None = None) -> bytes:
    """Rows of 4 cells: random doubles' shortest forms, decimals of 0–25 digits and
    integers in [lowest, largest] (lowest: -largest)."""
    cells: list[str] = []
    while len(cells) < n_cells:
        x = struct.unpack("<d", struct.pack("<Q", rng.getrandbits(64)))[0]
        if x == x and abs(x) != float("inf"):
            cells.append(repr(x))
        cells.append(f"{rng.uniform(-1e6, 1e6):.{rng.randint(0, 25)}e}")
        cells.append(str(rng.randint(-largest if lowest is None else lowest, largest)))
    rows = ",".join("[" + ",".join(cells[i:i + 4]) + "]" for i in range(0, len(cells) - 3, 4))
    return ('{"columns": ["a", "b", "c", "d"], "rows": [' + rows + '], "k": 3}').encode()


def test_fast_path_values_are_bit_for_bit_the_standard_librarys(
        monkeypatch: pytest.MonkeyPatch) -> None:
    raw = _random_number_table(random.Random(0), 4000, 10**18 - 1)  # 18 digits at most
    assert jsonio.decode_exact(raw) is not jsonio.UNSURE  # the fast path was taken
    _check(raw, monkeypatch)


# (body, the field its refusal names; None: no duplicate, it parses)
DUPLICATES = [
    # the envelope
    ('{"columns": ["a"], "rows": [[1]], "k": 2, "k": 3}', "body"),
    ('{"records": [{"a": 1}], "groups": [1], "groups": [2]}', "body"),
    # a record, first and later
    ('{"records": [{"a": 1, "a": 2}, {"a": 3}], "groups": [1, 2]}', "records[0]"),
    ('{"records": [{"a": 1, "b": 2}, {"b": 3, "a": 4, "b": 5}], "groups": [1]}', "records[1]"),
    # an object inside a record, a row, a list in the envelope, deeper still
    ('{"records": [{"a": {"x": 1, "x": 2}}], "groups": [1]}', "records[0]"),
    ('{"columns": ["a"], "rows": [[{"x": 1, "x": 1}]]}', "records[0]"),
    ('{"columns": ["a"], "rows": [[1]], "extra": [{"y": 0}, {"x": 1, "x": 1}]}', "records[1]"),
    ('{"columns": ["a"], "rows": [[[[{"p": {"q": [{"r": 1, "r": 2}]}}]]]]}', "records[0]"),
    ('{"records": [{"a": 1}], "groups": [1], "meta": {"x": {"y": 1, "y": 2}}}', "records[1]"),
    ('{"meta": {"x": 1, "x": 2}, "records": [{"a": 1}]}', "records[0]"),
    ('{"records": [{"id": "x:y", "id": 1}], "groups": ["g:1"]}', "records[0]"),
    ('{"columns": ["a:b"], "rows": [["\\u003a", 1]], "rows": [[2]]}', "body"),
    # the same key once per object is no duplicate; strings holding ":" "{" "["
    ('{"records": [{"a": 1}, {"a": 2}], "groups": [1, 2]}', None),
    ('{"records": [{"id": "x:y{[", "a": 1}], "groups": ["g:1"]}', None),
]


@pytest.mark.parametrize(("raw", "where"), DUPLICATES)
def test_duplicate_keys_at_every_level_are_refused_as_before(
        raw: str, where: str | None, monkeypatch: pytest.MonkeyPatch) -> None:
    outcome = _check(raw.encode(), monkeypatch)
    if where is None:
        assert outcome[0] == "ok"
    else:
        assert outcome[:2] == ("error", "InvalidInput")
        assert [e["field"] for e in outcome[3]] == [where]
        assert "appears more than once" in outcome[2]


OTHER_BODIES = [
    b"", b" ", b"{}", b"[]", b"null", b'"text"', b"{} x", b"{}{}", b"[1,]", b"{,}",
    b"{'a': 1}", b"\xef\xbb\xbf{}", b'{"a": "\\ud800"}', b'{"a": "\\ud83d\\ude00"}',
    b'{"a": "\x01"}', b'{"a": "\xff"}', '{"a": "\u00e9\u2028"}'.encode(),
    b'{"a": "\\u00E9\\/\\n"}', '{"a": 1}'.encode("utf-16"), b'{"a": tru}',
    b'{"a": True}', b'{"a"  :  [ 1 ,\t2 ]\r\n}', b'{"a":1}\x0c', b'{"a":1}\xc2\xa0',
    b'{"records": [' + b"[" * 1100 + b"]" * 1100 + b"]}",
    b'{"rows": [[' + b"[" * 995 + b"]" * 995 + b"]]}",
    b'{"rows": [[1]], "deep": ' + b"[" * 30 + b"]" * 30 + b"}",
    b'{"rows": [[{}, 1], [{}]], "k": {}}', b'{"rows": [[{}, {"a": {}}]]}',
    b'{"records": [{"a": {}}, {"a": [1]}], "options": {"x": [[]]}}',
]


@pytest.mark.parametrize("raw", OTHER_BODIES)
def test_other_bodies_parse_or_fail_as_before(raw: bytes,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    _check(raw, monkeypatch)


def test_table_shapes_take_the_fast_path() -> None:
    X, y = iris_batches(1, seed=5)[0]
    for body in (records_body(X, y),
                 {"columns": IRIS_FEATURES, "rows": X.tolist(), "groups": y.tolist()},
                 {"records": [{**r, "id": f"r{i}"} for i, r in enumerate(as_records(X))],
                  "groups": [f"g{v}" for v in y], "k": "auto"}):
        raw = json.dumps(body).encode()
        assert _same(jsonio.decode_exact(raw), json.loads(raw))


# -- through the API ---------------------------------------------------------------


def test_a_large_body_with_a_duplicate_key_is_refused(api: SpecClient, metric: str,
                                                      unchanged) -> None:
    """Over the offload size (parsed in the helper process) and under it."""
    X, y = iris_batches(1, seed=6)[0]
    records = as_records(X)
    for repeat in (1, 8000):
        items = [json.dumps(r) for r in records * repeat]
        items[-1] = items[-1][:-1] + f', "{IRIS_FEATURES[2]}": 1.0}}'
        raw = ('{"records": [' + ",".join(items) + '], "groups": '
               + json.dumps([int(v) for v in y] * repeat) + "}").encode()
        with unchanged():
            problem = assert_problem(
                api.post("/v1/metrics/iris/batches", data=raw,
                         content_type="application/json"),
                422, f"records[{len(items) - 1}]")
            assert IRIS_FEATURES[2] in problem["detail"]


def test_non_finite_literals_are_refused_as_before(api: SpecClient, metric: str,
                                                   unchanged) -> None:
    X, y = iris_batches(1, seed=7)[0]
    for literal in ("NaN", "Infinity", "-Infinity", "1e999"):
        rows = json.dumps(X.tolist())
        raw = ('{"columns": ' + json.dumps(IRIS_FEATURES) + ', "rows": '
               + rows.replace(repr(float(X[3, 1])), literal, 1) + ', "groups": '
               + json.dumps([int(v) for v in y]) + "}").encode()
        with unchanged():
            assert_problem(api.post("/v1/metrics/iris/batches", data=raw,
                                    content_type="application/json"), 422, "rows[3]")


# -- number tables read straight into a matrix (jsonio.number_rows) -----------------
#
# Reference: the same body read with the number path switched off, i.e. the strict
# parse (or orjson where decode_exact proves it equal) and service.tables.from_json.
# The table's numbers are compared bit for bit, the envelope by type and value, and
# a refusal by its type, detail and errors.


def _read(raw: bytes, kind: str, number_path: bool, monkeypatch: pytest.MonkeyPatch,
          caps: tuple[int | None, int | None] = (None, None)) -> Any:
    from marshmallow import ValidationError

    from service.api import offload
    from service.errors import ServiceError

    with monkeypatch.context() as m:
        if not number_path:
            m.setattr(offload, "number_rows", lambda raw: jsonio.UNSURE)
        try:
            table, envelope = offload.read_json_table(raw, kind, caps)
        except ServiceError as exc:
            return "error", type(exc).__name__, exc.detail, exc.errors
        except ValidationError as exc:
            return "invalid", exc.messages
    missing = None if table.missing is None else table.missing.tolist()
    return ("ok", table.names, table.numbers.shape, table.numbers.tobytes(), missing,
            sorted(table.text), table.kind, table.groups, envelope)


def _check_table(raw: bytes, monkeypatch: pytest.MonkeyPatch, **kw: Any) -> Any:
    outcomes = []
    for kind in ("grouping", "batch"):
        fast = _read(raw, kind, True, monkeypatch, **kw)
        strict = _read(raw, kind, False, monkeypatch, **kw)
        assert _same(fast, strict), (raw[:200], kind, fast, strict)
        outcomes.append(fast)
    return outcomes


def test_number_rows_are_bit_for_bit_the_standard_librarys(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # integers within 64 bits, which doubles round (beyond them: the strict path)
    raw = _random_number_table(random.Random(1), 6000, 2**64 - 1, lowest=-2**63)
    parsed = jsonio.number_rows(raw)
    assert parsed is not jsonio.UNSURE  # the number path was taken
    strict = json.loads(raw)
    assert parsed[1].tobytes() == np.array(strict["rows"], dtype=float).tobytes()
    _check_table(raw, monkeypatch)


# bodies the number path must leave to the strict path (each still read as before)
NOT_NUMBER_TABLES = [
    b'{"columns": ["a", "b"], "rows": [[1, [2]], [3, 4]]}',  # a list with one number
    b'{"columns": ["a", "b"], "rows": [[[1, 2], []], [3, 4]]}',  # leaves add up
    b'{"columns": ["a", "b"], "rows": [[1, 2, 3], [4]]}',  # ragged, same total
    b'{"columns": ["a", "b"], "rows": [[1, 2], 3, 4]}',
    b'{"columns": ["a", "b"], "rows": [[1, null], [3, 4]]}',
    b'{"columns": ["a", "b"], "rows": [[1, true], [3, 4]]}',
    b'{"columns": ["a", "b"], "rows": [[1, "x"], [3, 4]]}',
    b'{"columns": ["a", "b"], "rows": [[1, {"x": 1}], [3, 4]]}',
    b'{"columns": ["a", "b"], "rows": [[1, 2], "ab"]}',
    b'{"columns": ["a", "b"], "rows": [[1, 2]], "rows": [[3, 4]]}',
    b'{"columns": ["a", "b"], "columns": ["a", "b"], "rows": [[1, 2]]}',
    b'{"columns": ["a", "b"], "rows": [[1, 2]], "k": 2, "k": 3}',
    b'{"columns": ["a", "b"], "rows": [[1, 2]], "k": {"x": 1, "x": 2}}',
    b'{"columns": ["a", "b"], "rows": [[1, 2]], "groups": [{"x": 1}]}',
    b'{"columns": ["a", "b"], "rows": [[1, 2]], "groups": [[1]]}',
    b'{"columns": ["a", "\\u0062"], "rows": [[1, 2]]}',
    b'{"columns": ["a", "\\ud800"], "rows": [[1, 2]]}',
    b'{"columns": ["a[0]", "b"], "rows": [[1, 2]]}',  # a "[" inside a string
    b'{"columns": ["a", "b"], "rows": [[1, NaN]]}',
    b'{"columns": ["a", "b"], "rows": [[1, 1e999]]}',
    b'{"columns": ["a", "b"], "rows": [[1, 2]]} x',
    b'\xef\xbb\xbf{"columns": ["a", "b"], "rows": [[1, 2]]}',
    '{"columns": ["a", "b"], "rows": [[1, 2]]}'.encode("utf-16"),
    b'{"columns": ["a", "\xed\xa0\x80"], "rows": [[1, 2]]}',  # a surrogate, UTF-8 encoded
    b'{"columns": [], "rows": [[1, 2]]}',
    b'{"columns": ["a", "b"], "rows": []}',
    b'{"columns": "ab", "rows": [[1, 2]]}',
    b'{"columns": ["a", "b"], "rows": {"a": 1}}',
    b'{"records": [{"a": 1}], "columns": ["a"], "rows": [[1]]}',
    b'[[1, 2]]',
]


@pytest.mark.parametrize("raw", NOT_NUMBER_TABLES)
def test_other_table_bodies_are_left_to_the_strict_path(
        raw: bytes, monkeypatch: pytest.MonkeyPatch) -> None:
    assert jsonio.number_rows(raw) is jsonio.UNSURE
    _check_table(raw, monkeypatch)


NUMBER_TABLE_ERRORS = [
    (b'{"columns": ["a", "a"], "rows": [[1, 2]]}', "columns"),
    (b'{"columns": ["a", ""], "rows": [[1, 2]]}', "columns"),
    (b'{"columns": ["a", 3], "rows": [[1, 2]]}', "columns"),
    (b'{"columns": ["a", "b"], "rows": [[1, 2]], "k": "many"}', "k"),
    (b'{"columns": ["a", "b"], "rows": [[1, 2]], "unknown": 1}', "unknown"),
    (b'{"columns": ["a", "b"], "rows": [[1, 2], [3, 4]], "groups": [1]}', "groups"),
    (b' \n{"columns": ["a", "b"], "rows": [[1, 2], [3, 4], [5, 6]]}', None),  # caps
]


@pytest.mark.parametrize(("raw", "field"), NUMBER_TABLE_ERRORS)
def test_number_tables_are_refused_as_before(raw: bytes, field: str | None,
                                             monkeypatch: pytest.MonkeyPatch) -> None:
    assert jsonio.number_rows(raw) is not jsonio.UNSURE
    outcomes = _check_table(raw, monkeypatch, caps=(2, None))
    assert any(o[0] != "ok" for o in outcomes)
    if field is None:  # three records over a cap of two
        assert outcomes[0][:2] == ("error", "PayloadTooLarge")


def test_the_kept_parser_is_shared_safely_and_bounded(monkeypatch: pytest.MonkeyPatch
                                                      ) -> None:
    raw = b'{"columns": ["a"], "rows": [[1], [2]]}'
    jsonio._kept.clear()
    assert jsonio.number_rows(raw)[1].tolist() == [[1.0], [2.0]]
    kept = jsonio._kept["parser"]  # kept for the next body
    assert jsonio.number_rows(raw)[1].tolist() == [[1.0], [2.0]]
    assert jsonio._kept["parser"] is kept
    with jsonio._kept_lock:  # another thread is parsing: a parser of its own
        assert jsonio.number_rows(raw)[1].tolist() == [[1.0], [2.0]]
    assert jsonio._kept["parser"] is kept
    held = kept.parse(raw)  # a document still alive: the parser refuses to parse
    assert jsonio.number_rows(raw) is jsonio.UNSURE  # the strict path decides
    assert "parser" not in jsonio._kept  # and the parser is dropped
    del held
    monkeypatch.setattr(jsonio, "KEEP_VALUES", 1)
    assert jsonio.number_rows(raw) is not jsonio.UNSURE
    assert "parser" not in jsonio._kept  # a parser that read more values is not kept
    monkeypatch.setattr(jsonio, "INLINE_BYTES", len(raw) - 1)
    assert jsonio.number_rows(raw) is jsonio.UNSURE  # too large to read inline


def test_a_large_number_table_is_grouped_without_the_helper_process(
        api: SpecClient, fitted: dict[str, Any], monkeypatch: pytest.MonkeyPatch) -> None:
    """Over the offload size, a number table never reaches the helper; the grouping
    equals the one of the same rows in the records form (which the helper parses)."""
    from service.api import offload

    X, _ = iris_batches(1, seed=8)[0]
    rows = np.tile(X, (2500, 1))
    body = {"columns": IRIS_FEATURES, "rows": rows.tolist(), "k": 3}
    raw = json.dumps(body).encode()
    assert len(raw) > offload.OFFLOAD_BYTES
    records = json.dumps({"records": as_records(rows), "k": 3}).encode()
    expected = api.post("/v1/metrics/iris/groupings", data=records,
                        content_type="application/json")
    assert expected.status_code == 200
    with monkeypatch.context() as m:
        m.setattr(offload, "_executor", lambda: pytest.fail("the helper was asked"))
        resp = api.post("/v1/metrics/iris/groupings", data=raw,
                        content_type="application/json")
    assert resp.status_code == 200, resp.get_data(as_text=True)
    assert resp.get_json() == expected.get_json()
