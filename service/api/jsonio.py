"""JSON answers encoded with orjson (several times faster than the standard library on
the long float lists a grouping returns). Bodies are still read by
``service.api.bodies.parse_json``, which refuses duplicate keys."""

from __future__ import annotations

import json
from typing import Any

import orjson
from flask.json.provider import JSONProvider

_OPTIONS = orjson.OPT_NON_STR_KEYS | orjson.OPT_SERIALIZE_NUMPY


def encode(obj: Any) -> bytes:
    try:
        return orjson.dumps(obj, option=_OPTIONS)
    except TypeError:  # what orjson does not take (integers beyond 64 bits): the slow way
        return json.dumps(obj, allow_nan=False).encode()


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
