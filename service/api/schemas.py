"""marshmallow schemas for request envelopes, and the one helper that reads a JSON body.

Only the envelope is checked here (which keys, their JSON types, enums, ranges). The
numeric matrix inside a batch or grouping request is validated as a whole by numpy in
``service.tables`` — never record by record. A value with a rule of its own (a fit's
parameters, ``k``, a version number, a reason, a metric name, a page's ``limit``) is
read by that rule's parse function in ``service.usecases.params`` (a :class:`Ruled`
field), which the use cases then trust: each rule is spelt once and run once.
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable
from functools import partial
from typing import Any

from flask import request
from marshmallow import Schema, ValidationError, fields, post_load, validate, validates_schema

from service.config import MAX_FEATURES
from service.errors import InvalidInput, MalformedRequest
from service.usecases import pages, params

from .bodies import body, parse_json

# a rule's field below its own: "alphas[1]" (an item) or "categories.island" (a key)
_BELOW = re.compile(r"[^.\[]+(?:\[(\d+)\]|\.(.+))")


class Ruled(fields.Field):
    """A value read by its rule (a parse function of ``service.usecases.params``): the
    rule's message, under the envelope's field name (``alphas[1]`` and
    ``categories.island`` stay below it).
    Null is handed to the rule too (it says whether null means something).
    ``query=True`` first reads a query string's digits as a whole number
    (``max_digits`` of them at most)."""

    def __init__(self, rule: Callable[[Any], Any], *, query: bool = False,
                 max_digits: int = 10, **kwargs: Any) -> None:
        super().__init__(**kwargs)
        self.rule = rule
        self.query = query
        self.max_digits = max_digits

    def deserialize(self, value: Any, attr: str | None = None, data: Any = None,
                    **kwargs: Any) -> Any:
        if value is None:
            return self._read(None)
        return super().deserialize(value, attr, data, **kwargs)

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if (self.query and isinstance(value, str) and value.isascii() and value.isdigit()
                and len(value) <= self.max_digits):  # ("²".isdigit(), but int() refuses it)
            value = int(value)
        return self._read(value)

    def _read(self, value: Any) -> Any:
        try:
            return self.rule(value)
        except InvalidInput as exc:
            below: dict[int | str, list[str]] = {}
            plain: list[str] = []
            for error in exc.errors or [{"field": "", "message": exc.detail}]:
                at = _BELOW.fullmatch(error["field"])
                if at:
                    key = int(at[1]) if at[1] is not None else at[2]
                    below.setdefault(key, []).append(error["message"])
                else:
                    plain.append(error["message"])
            raise ValidationError(below or plain) from exc


class JSONArray(fields.Field):
    """A JSON array passed through untouched (its items are checked in bulk elsewhere)."""

    default_error_messages = {"invalid": "Not a valid list."}

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> list:
        if not isinstance(value, list):
            raise self.make_error("invalid")
        return value


class BoundedList(fields.List):
    """A list whose length is checked before any of its items (a huge list of names
    is refused at once, not after validating millions of items)."""

    def __init__(self, inner: fields.Field, max_items: int, **kwargs: Any) -> None:
        super().__init__(inner, **kwargs)
        self.max_items = max_items

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> list:
        if isinstance(value, list) and len(value) > self.max_items:
            raise ValidationError(f"At most {self.max_items} items.")
        return super()._deserialize(value, attr, data, **kwargs)


class _Strict(Schema):
    """Unknown keys are an error (marshmallow's default, stated here on purpose)."""

    class Meta:
        unknown = "raise"


class MetricSchema(_Strict):
    features = Ruled(params.feature_names, required=True)
    description = Ruled(params.description, load_default="")
    categories = Ruled(params.level_map, load_default=dict)
    missing_values = Ruled(params.missing_policy, load_default="refuse")
    ignore_extra_columns = fields.Boolean(load_default=False)


class _TableSchema(_Strict):
    """Either ``records`` (objects keyed by feature) or ``columns`` + ``rows``."""

    records = JSONArray(validate=validate.Length(min=1))
    columns = BoundedList(fields.String(), MAX_FEATURES, validate=validate.Length(min=1))
    rows = JSONArray(validate=validate.Length(min=1))

    @validates_schema
    def _one_form(self, data: dict[str, Any], **kwargs: Any) -> None:
        has_records = "records" in data
        has_columns, has_rows = "columns" in data, "rows" in data
        if has_records and (has_columns or has_rows):
            raise ValidationError(
                "Give either records or columns with rows, not both.", "records"
            )
        if not has_records and not (has_columns or has_rows):
            raise ValidationError("Give either records or columns with rows.", "records")
        if has_columns != has_rows:
            missing = "rows" if has_columns else "columns"
            raise ValidationError("columns and rows go together.", missing)


class BatchSchema(_TableSchema):
    groups = JSONArray(required=True, validate=validate.Length(min=1))


def _nullable_version(value: Any) -> params.VersionNumber | None:
    return None if value is None else params.version_number(value)


class GroupingSchema(_TableSchema):
    k = Ruled(params.group_count)
    version = Ruled(_nullable_version)


class FitSchema(_Strict):
    """Fit parameters, each read by its rule (``service.usecases.params.FIT_FIELDS``);
    loads as a :class:`~service.usecases.params.FitParams`."""

    method = Ruled(params.FIT_FIELDS["method"])
    activate = Ruled(params.FIT_FIELDS["activate"])
    alphas = Ruled(params.FIT_FIELDS["alphas"])
    n_folds = Ruled(params.FIT_FIELDS["n_folds"])
    max_rank = Ruled(params.FIT_FIELDS["max_rank"])
    k_max = Ruled(params.FIT_FIELDS["k_max"])
    seed = Ruled(params.FIT_FIELDS["seed"])

    @post_load
    def _params(self, data: dict[str, Any], **kwargs: Any) -> params.FitParams:
        return params.FitParams(**data)


class ActivationSchema(_Strict):
    version = Ruled(params.version_number, required=True)
    reason = Ruled(params.reason, load_default=params.Reason(""))


_COLUMN = validate.Length(min=1, max=128)


class BatchStatsSchema(_Strict):
    """The envelope of a ``likewise.batch-stats/1`` document (service/batch_stats.py
    checks the numbers with numpy)."""

    format = fields.String(required=True)
    features = BoundedList(fields.String(validate=validate.Length(min=1, max=256)),
                           MAX_FEATURES, required=True, validate=validate.Length(min=1))
    n = fields.Raw(required=True)
    k = fields.Raw(required=True)
    group_sizes = fields.Dict(keys=fields.String(validate=validate.Length(min=1, max=256)),
                              values=fields.Raw(), required=True)
    sums = JSONArray(required=True)
    scatter = JSONArray(required=True)
    between = JSONArray(required=True)


class BatchStatsQuerySchema(_Strict):
    allow_duplicate = fields.Boolean(load_default=False)


class BatchQuerySchema(_Strict):
    allow_duplicate = fields.Boolean(load_default=False)
    ignore_extra_columns = fields.Boolean(load_default=None)
    group_column = fields.String(validate=_COLUMN)


class GroupingQuerySchema(_Strict):
    ignore_extra_columns = fields.Boolean(load_default=None)
    id_column = fields.String(validate=_COLUMN)
    k = Ruled(params.group_count, query=True, max_digits=6)
    version = Ruled(params.version_number, query=True)


class PageQuerySchema(_Strict):
    """``limit`` and ``cursor`` of every list (their rules: ``service.usecases.pages``;
    a cursor is read by the list it belongs to)."""

    limit = Ruled(pages.check_limit, query=True, load_default=pages.DEFAULT_LIMIT)
    cursor = fields.String()


class FitQuerySchema(PageQuerySchema):
    metric = Ruled(partial(params.metric_name, field="metric"))
    status = Ruled(params.fit_status)


class DriftQuerySchema(_Strict):
    version = Ruled(params.version_number, query=True, max_digits=18)
    since = Ruled(params.moment)


# a \uD800-\uDFFF escape in the raw text: json.loads pairs the valid ones up, but keeps
# an unpaired one as a lone surrogate, which is not Unicode text (Redis writes fail)
_SURROGATE_ESCAPE = re.compile(rb"\\u[dD][89a-fA-F][0-9a-fA-F]{2}")


def _has_lone_surrogate(data: Any) -> bool:
    try:
        json.dumps(data, ensure_ascii=False).encode("utf-8")
    except UnicodeEncodeError:
        return True
    return False


def json_body(schema: Schema, empty_ok: bool = False) -> dict[str, Any]:
    """Read the request's JSON object and load it with ``schema``.

    Wrong content type or malformed JSON → 400 (MalformedRequest); a body that is
    valid JSON but not an object → 400; a string with an unpaired surrogate escape → 400
    (it cannot be stored or echoed as UTF-8); envelope errors → marshmallow's ValidationError
    (422 via the problem handlers). ``empty_ok`` lets a body-less request mean ``{}``.
    """
    if empty_ok and not body():
        return schema.load({})
    if not request.is_json:
        raise MalformedRequest(
            f"Expected a JSON body (Content-Type: application/json), got "
            f"{request.mimetype or 'no content type'}."
        )
    return load_json(body(), schema)


def load_json(raw: bytes, schema: Schema) -> dict[str, Any]:
    """A JSON object's bytes, parsed once and loaded with ``schema`` (see json_body)."""
    try:
        data = parse_json(raw, frozenset(schema.fields))
    except ValueError as exc:  # JSONDecodeError, or bytes that are not UTF-8
        raise MalformedRequest("The body is not valid JSON.") from exc
    except RecursionError as exc:  # the parser recurses once per nesting level
        raise MalformedRequest("The body's JSON is nested too deeply.") from exc
    if not isinstance(data, dict):
        raise MalformedRequest("The body must be a JSON object.")
    if _SURROGATE_ESCAPE.search(raw) and _has_lone_surrogate(data):
        raise MalformedRequest(
            "The body has a string with an unpaired \\uD800-\\uDFFF escape, which is not "
            "Unicode text.")
    return schema.load(data)


def query_args(schema: Schema) -> dict[str, Any]:
    """Load the query string with ``schema`` (single values only)."""
    return schema.load(request.args.to_dict(flat=True))
