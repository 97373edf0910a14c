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


@pytest.mark.parametrize("number", NUMBERS)
def test_numbers_parse_as_the_standard_library_parses_them(
        number: str, monkeypatch: pytest.MonkeyPatch) -> None:
    for shape in SHAPES:
        _check(shape.format(n=number).encode(), monkeypatch)


def test_fast_path_values_are_bit_for_bit_the_standard_librarys(
        monkeypatch: pytest.MonkeyPatch) -> None:
    rng = random.Random(0)
    cells = []
    while len(cells) < 4000:
        x = struct.unpack("<d", struct.pack("<Q", rng.getrandbits(64)))[0]
        if x == x and abs(x) != float("inf"):
            cells.append(repr(x))
        cells.append(f"{rng.uniform(-1e6, 1e6):.{rng.randint(0, 25)}e}")
        cells.append(str(rng.randint(-10**18 + 1, 10**18 - 1)))  # 18 digits at most
    rows = ",".join("[" + ",".join(cells[i:i + 4]) + "]" for i in range(0, len(cells) - 3, 4))
    raw = ('{"columns": ["a", "b", "c", "d"], "rows": [' + rows + "]}").encode()
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
