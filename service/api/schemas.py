"""marshmallow schemas for request envelopes, and the one helper that reads a JSON body.

Only the envelope is checked here (which keys, their JSON types, enums, ranges). The
numeric matrix inside a batch or grouping request is validated as a whole by numpy in
``service.tables`` — never record by record.
"""

from __future__ import annotations

import json
import math
import re
from typing import Any

from flask import request
from marshmallow import Schema, ValidationError, fields, validate, validates_schema

from service.config import MAX_FEATURES
from service.errors import MalformedRequest
from service.usecases import fits, pages
from service.usecases.metrics import MAX_DESCRIPTION, MISSING_POLICIES
from service.usecases.versions import MAX_REASON

from .bodies import parse_json

# one source of truth: the use cases' lists and limits (the methods come from the
# core's learners)
FIT_METHODS = fits.METHODS
ACTIVATE_POLICIES = fits.ACTIVATE
FIT_STATUSES = fits.STATUSES


def _int_field(name: str) -> fields.Integer:
    lo, hi, optional = fits.INT_RANGES[name]
    return fields.Integer(strict=True, validate=validate.Range(min=lo, max=hi),
                          allow_none=optional)


class JSONArray(fields.Field):
    """A JSON array passed through untouched (its items are checked in bulk elsewhere)."""

    default_error_messages = {"invalid": "Not a valid list."}

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> list:
        if not isinstance(value, list):
            raise self.make_error("invalid")
        return value


class KField(fields.Field):
    """``k``: a whole number ≥ 1, or ``"auto"`` (null means the same as "auto")."""

    default_error_messages = {"invalid": 'Must be a whole number of at least 1, or "auto".'}

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if value == "auto":
            return "auto"
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
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


class PositiveNumber(fields.Field):
    """A finite JSON number > 0 (no strings, no booleans)."""

    default_error_messages = {"invalid": "Must be a finite number greater than 0."}

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.make_error("invalid")
        if not math.isfinite(value) or value <= 0:
            raise self.make_error("invalid")
        return float(value)


class _Strict(Schema):
    """Unknown keys are an error (marshmallow's default, stated here on purpose)."""

    class Meta:
        unknown = "raise"


class MetricSchema(_Strict):
    features = BoundedList(
        fields.String(validate=validate.Length(min=1, max=128)),
        MAX_FEATURES,
        required=True,
        validate=validate.Length(min=1),
    )
    description = fields.String(load_default="", validate=validate.Length(max=MAX_DESCRIPTION))
    categories = fields.Dict(
        keys=fields.String(validate=validate.Length(min=1, max=128)),
        values=BoundedList(fields.String(validate=validate.Length(min=1, max=128)),
                           MAX_FEATURES, validate=validate.Length(min=1)),
        load_default=dict)
    missing_values = fields.String(load_default="refuse",
                                   validate=validate.OneOf(MISSING_POLICIES))
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


class GroupingSchema(_TableSchema):
    k = KField(load_default=None, allow_none=True)
    version = fields.Integer(strict=True, validate=validate.Range(min=1), allow_none=True)


def _activate_policy(value: str) -> None:
    if value not in ACTIVATE_POLICIES:
        raise ValidationError(fits.activate_message(value))


class FitSchema(_Strict):
    """Fit parameters; the ranges are those of ``service.usecases.fits.normalize_params``."""

    method = fields.String(load_default="auto", validate=validate.OneOf(FIT_METHODS))
    activate = fields.String(load_default=fits.DEFAULTS["activate"], validate=_activate_policy)
    alphas = fields.List(
        PositiveNumber(),
        validate=validate.Length(min=1, max=fits.MAX_ALPHAS),
        allow_none=True,
    )
    n_folds = _int_field("n_folds")
    max_rank = _int_field("max_rank")
    k_max = _int_field("k_max")
    seed = _int_field("seed")


class ActivationSchema(_Strict):
    version = fields.Integer(strict=True, required=True, validate=validate.Range(min=1))
    reason = fields.String(load_default="", validate=validate.Length(max=MAX_REASON))


class QueryKField(KField):
    """``k`` in a query string: digits, or ``auto``."""

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, str) and value.isdigit() and len(value) <= 6:
            value = int(value)
        return super()._deserialize(value, attr, data, **kwargs)


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
    k = QueryKField()
    version = fields.Integer(validate=validate.Range(min=1, max=2**31))


class PageQuerySchema(_Strict):
    """``limit`` and ``cursor`` of every list (``service.usecases.pages``)."""

    limit = fields.Integer(validate=validate.Range(min=1, max=pages.MAX_LIMIT))
    cursor = fields.String(validate=validate.Length(min=1, max=pages.MAX_CURSOR))


class FitQuerySchema(PageQuerySchema):
    metric = fields.String(validate=validate.Length(min=1, max=64))
    status = fields.String(validate=validate.OneOf(FIT_STATUSES))


class DriftQuerySchema(_Strict):
    version = fields.Integer(strict=False, validate=validate.Range(min=1))
    since = fields.String(validate=validate.Length(min=1, max=64))


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
    if empty_ok and not request.get_data(cache=True):
        return schema.load({})
    if not request.is_json:
        raise MalformedRequest(
            f"Expected a JSON body (Content-Type: application/json), got "
            f"{request.mimetype or 'no content type'}."
        )
    return load_json(request.get_data(cache=True), schema)


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
