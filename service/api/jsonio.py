"""JSON on orjson, both ways.

Answers are encoded with orjson (several times faster than the standard library on
the long float lists a grouping returns). Bodies are decoded with orjson too, through
:func:`decode_exact`, which hands a body back to the strict standard-library parse
(``service.api.bodies.parse_json``: duplicate keys refused, naming where) whenever
orjson's result could differ from it:

- orjson refuses the body (malformed JSON, ``NaN``/``Infinity`` literals, numbers that
  overflow a double, lone surrogate escapes, a byte-order mark, text that is not
  UTF-8, nesting over 1,024 levels): the strict parse gives its own answer or error;
- an integer literal of 19 digits or more: orjson reads integers outside 64 bits as
  floats, the standard library exactly;
- the body's brackets and colons are not all accounted for (below).

Duplicate keys without a hook per object: every list of the parsed value was opened
by a ``[`` of its own in the text, and every key of a parsed object was followed by a
``:`` of its own, so the text holds at least as many of each byte as the value has
lists and keys — more colons when a key appeared twice (the parse keeps one), or when
strings hold these bytes. :func:`_shallow` counts the lists and keys of the value's
first three levels (the envelope, the lists and objects it holds and their items:
every table shape), a few C-speed passes. When the text has exactly as many ``:`` as
those keys, no key was given twice anywhere; with as many ``[`` as those lists too,
every container with content lies within those levels (an object found nowhere has
no key, so is empty), and the value is at most four levels deep: the strict parser's
recursion limit is not in play. Otherwise the strict parse decides. Tested against the
standard library in ``tests/api/test_jsonio.py``.

Number tables skip Python objects altogether: :func:`number_rows` reads a
``columns`` + ``rows`` body whose rows are all numbers with simdjson, straight into a
float64 matrix (about 4× faster than orjson's lists plus ``np.asarray`` on a
100,000 × 20 body), and hands anything else to the paths above.
"""

from __future__ import annotations

import gc
import json
import re
import threading
from typing import Any

import numpy as np
import orjson
import simdjson
from flask.json.provider import JSONProvider

_OPTIONS = orjson.OPT_NON_STR_KEYS | orjson.OPT_SERIALIZE_NUMPY

UNSURE = object()  # decode_exact's answer when the strict parse must decide

# digits → "0", the bytes that may come before more digits inside a number → "f", all
# else (the sign too) → " ": an integer literal of 19 digits or more then reads
# " 000…"; a fraction's digits follow an "f" (an exponent's may read " 000…" after a
# minus sign: a false alarm, the strict parse then decides)
_NUMBER_SHAPE = bytes(
    ord("0") if 48 <= b <= 57 else ord("f") if chr(b) in ".eE+" else ord(" ")
    for b in range(256))
_LONG = b" " + b"0" * 19


def encode(obj: Any) -> bytes:
    try:
        return orjson.dumps(obj, option=_OPTIONS)
    except TypeError:  # what orjson does not take (integers beyond 64 bits): the slow way
        return json.dumps(obj, allow_nan=False).encode()


def _shallow(data: dict[str, Any]) -> tuple[int, int]:
    """(lists, keys) among the object ``data``, its values and their items."""
    lists, keys = 0, len(data)
    for value in data.values():
        kind = type(value)
        if kind is dict:
            keys += len(value)
            inner = list(value.values())
        elif kind is list:
            lists += 1
            inner = value
        else:
            continue
        kinds = set(map(type, inner))
        if list in kinds:
            lists += len(inner) if kinds == {list} else sum(map(list.__instancecheck__, inner))
        if dict in kinds:
            found = inner if kinds == {dict} else list(filter(dict.__instancecheck__, inner))
            keys += sum(map(len, found))
    return lists, keys


def _long_integer(raw: bytes) -> bool:
    """An integer literal of ≥ 19 digits (or the like) in ``raw``, which starts with
    ``{`` or white space: the value parsed to an object."""
    return raw.translate(_NUMBER_SHAPE).find(_LONG) >= 0


def _loads_without_gc(raw: bytes) -> Any:
    """``orjson.loads`` with the cyclic garbage collector paused: a table body makes a
    list per row, and each collection the new lists set off walks every one made
    so far (a third of the parse time of a 100,000-row body, measured). Nothing a
    parse makes can form a cycle. Re-enabled only by the call that paused it."""
    paused = gc.isenabled()
    if paused:
        gc.disable()
    try:
        return orjson.loads(raw)
    finally:
        if paused:
            gc.enable()


def decode_exact(raw: bytes) -> Any:
    """``raw`` parsed by orjson when that provably equals the standard library's
    ``json.loads`` of an object without a duplicate key; else :data:`UNSURE`."""
    if not isinstance(raw, bytes):
        return UNSURE
    try:
        data = _loads_without_gc(raw)
    except orjson.JSONDecodeError:
        return UNSURE
    if type(data) is not dict:
        return UNSURE
    lists, keys = _shallow(data)
    if raw.count(b":") != keys or raw.count(b"[") != lists or _long_integer(raw):
        return UNSURE
    return data


_OPENS_OBJECT = re.compile(rb"[ \t\n\r]*\{")
_SCALARS = {str, int, float, bool, type(None)}


def number_rows(raw: bytes) -> tuple[dict[str, Any], np.ndarray] | object:
    """``(envelope, X)`` for a body that is an object with ``columns`` (c names) and
    ``rows`` (n lists of c numbers each): ``X`` the n × c float64 matrix of the rows,
    ``envelope`` every other key's value; :data:`UNSURE` for any other body, or when
    the strict parse could read it differently.

    What makes the answer equal the strict parse's (tested in
    ``tests/api/test_jsonio.py``): simdjson accepts only RFC 8259 JSON in UTF-8 and
    fails on numbers outside a double or 64-bit integers (the standard library's
    extras — ``NaN``, surrogate-escaped bytes — take the strict path); a body without
    ``\\`` has no escapes, so no lone surrogate; the object's keys are listed as
    given, so a duplicate shows; the other values must be scalars or lists of
    scalars (no object whose duplicate keys a conversion could hide). ``rows`` is
    flattened into doubles only if every leaf is a number; every item of it is a
    list of c values, and the text holds no ``[`` beyond those lists and the other
    values' lists, so no item holds a list: each row is c numbers. Integers convert
    to the nearest double, as ``float()`` does. Parsing is linear in the body; bodies
    over :data:`INLINE_BYTES` are left to the helper process.
    """
    if type(raw) is not bytes or not _OPENS_OBJECT.match(raw) or b"\\" in raw:
        return UNSURE
    # without escapes the key can only be spelt so: a records body is not parsed twice
    if len(raw) > INLINE_BYTES or b'"rows"' not in raw:
        return UNSURE
    parser, kept = _take_parser()
    values = 0
    try:
        try:
            doc = parser.parse(raw)
        except (ValueError, RuntimeError):  # not JSON simdjson takes: the strict parse decides
            return UNSURE
        try:
            answer = _read_number_rows(raw, doc)
            if answer is not UNSURE:
                values = answer[1].size  # type: ignore[index]
            return answer
        finally:
            del doc  # the parser is reusable once nothing refers to its last document
    finally:
        if kept:
            _give_back(parser, values)


INLINE_BYTES = 64 * 1024 * 1024  # larger bodies (grouping runs) go to the helper process
# a parser keeps the buffers its largest document needed (about 33 bytes a value,
# measured): one that read more values than this (~130 MiB kept), or whose body turned
# out not to be a number table, is dropped instead of kept
KEEP_VALUES = 4 * 1024 * 1024
_kept: dict[str, simdjson.Parser] = {}
_kept_lock = threading.Lock()


def _take_parser() -> tuple[simdjson.Parser, bool]:
    """The process's kept parser (allocating a parser's buffers afresh costs about half
    a parse on a 40 MB body, measured), or a new one while another thread uses it;
    True when it is the kept one, to be given back."""
    if not _kept_lock.acquire(blocking=False):
        return simdjson.Parser(), False
    return _kept.pop("parser", None) or simdjson.Parser(), True


def _give_back(parser: simdjson.Parser, values: int) -> None:
    if 0 < values <= KEEP_VALUES:
        _kept["parser"] = parser
    _kept_lock.release()


_COUNT_STEP = 1 << 20


def _count(raw: bytes, byte: bytes) -> int:
    """``raw.count(byte)`` for one byte, in steps of 1 MiB through one small buffer
    (about twice as fast as ``bytes.count`` on large bodies, and no body-sized
    temporary)."""
    data = np.frombuffer(raw, dtype=np.uint8)
    hits = np.empty(min(_COUNT_STEP, data.size), dtype=bool)
    total = 0
    for start in range(0, data.size, _COUNT_STEP):
        part = data[start:start + _COUNT_STEP]
        out = hits[:part.size]
        np.equal(part, byte[0], out=out)
        total += int(np.count_nonzero(out))
    return total


def _read_number_rows(raw: bytes, doc: Any) -> tuple[dict[str, Any], np.ndarray] | object:
    if not isinstance(doc, simdjson.Object):
        return UNSURE
    keys = list(doc.keys())
    if len(set(keys)) != len(keys) or "rows" not in keys or "columns" not in keys:
        return UNSURE
    envelope: dict[str, Any] = {}
    lists = 0
    for key in keys:
        if key == "rows":
            continue
        value = doc[key]
        if isinstance(value, simdjson.Array):
            value = value.as_list()
            if not set(map(type, value)) <= _SCALARS:
                return UNSURE
            lists += 1
        elif isinstance(value, simdjson.Object):
            return UNSURE
        envelope[key] = value
    rows, columns = doc["rows"], envelope["columns"]
    if not isinstance(rows, simdjson.Array) or type(columns) is not list:
        return UNSURE
    n, c = len(rows), len(columns)
    if n == 0 or c == 0:
        return UNSURE
    try:
        if set(map(len, rows)) != {c}:  # a number has no len: TypeError
            return UNSURE
        flat = np.frombuffer(rows.as_buffer(of_type="d"), dtype=np.float64)
    except (TypeError, ValueError):  # a leaf that is not a number
        return UNSURE
    if flat.size != n * c or _count(raw, b"[") != 1 + n + lists:
        return UNSURE
    return envelope, flat.reshape(n, c)


class FastJSON(JSONProvider):
    """Flask's JSON provider on orjson: key order kept, NaN never written (the use cases
    give null for undefined values)."""

    def dumps(self, obj: Any, **kwargs: Any) -> str:
        return encode(obj).decode()

    def loads(self, s: str | bytes, **kwargs: Any) -> Any:
        return json.loads(s)

    def response(self, *args: Any, **kwargs: Any):  # noqa: ANN201 — a flask Response
        obj = self._prepare_response_obj(args, kwargs)
        return self._app.response_class(encode(obj), mimetype="application/json")
