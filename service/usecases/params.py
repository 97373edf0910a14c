"""The rules of the values a request carries, each spelt once, as one parse function.

A parse function takes a raw value (as JSON decoded it, or as a caller holds it) and
returns a small typed value — :class:`MetricName`, :class:`VersionNumber`,
:class:`GroupCount`, :class:`Reason`, :class:`FitParams`, a metric's feature names,
description, categories and missing-value policy — or raises
:class:`~service.errors.InvalidInput` naming the field at fault. The HTTP schemas
(``service/api/schemas.py``) run these functions as their fields, so a request's
values are checked once, at the edge, and the problem names the envelope's field; the
use cases take the typed values and do not check them again. Workers, the CLI and
tests that call a use case build its values with the same functions.

A metric name is the exception that proves the rule: it arrives in the URL path, not
in a schema, so :func:`~service.usecases.metrics.require_metric` reads a plain string
with :func:`metric_name` (once) and lets a :class:`MetricName` through unchecked.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from dataclasses import asdict, dataclass
from datetime import datetime, timezone
from typing import Any

from service.config import MAX_FEATURES
from service.core import METHODS as LEARNERS
from service.errors import InvalidInput
from service.lifecycle import FORMER_ACTIVATE, FitStatus

# the only spelling of the metric-name pattern (openapi.yaml's MetricName copies it and
# tests/test_params.py holds the two together); names never contain ":" (key layout)
NAME_RE = re.compile(r"[a-z0-9_-]{1,64}")
MAX_REASON = 1000
FEATURE_RE = re.compile(r"[^\x00-\x1f]{1,128}")
MAX_DESCRIPTION = 2000
MISSING_POLICIES = ("refuse", "impute_mean")


class MetricName(str):
    """A metric name that :func:`metric_name` accepted."""

    __slots__ = ()


class VersionNumber(int):
    """A version number that :func:`version_number` accepted (a whole number ≥ 1)."""

    __slots__ = ()


class GroupCount(int):
    """``k`` that :func:`group_count` accepted (a whole number ≥ 1; "auto" is None)."""

    __slots__ = ()


class Reason(str):
    """An activation's reason that :func:`reason` accepted."""

    __slots__ = ()


def metric_name(value: Any, field: str = "name") -> MetricName:
    """Lowercase letters, digits, ``-`` and ``_``, 1 to 64 of them."""
    if type(value) is MetricName:
        return value
    if not isinstance(value, str) or not NAME_RE.fullmatch(value):
        raise InvalidInput.field(field, "use 1 to 64 lowercase letters, digits, '-' or '_'",
                                 f"invalid metric name {value!r}")
    return MetricName(value)


def _whole(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def version_number(value: Any, field: str = "version") -> VersionNumber:
    if not _whole(value) or value < 1:
        raise InvalidInput.field(field, "a version number (whole number ≥ 1)")
    return VersionNumber(value)


def group_count(value: Any, field: str = "k") -> GroupCount | None:
    """``k``: a whole number ≥ 1, or ``"auto"`` / null (None: the service chooses)."""
    if value is None or value == "auto":
        return None
    if not _whole(value) or value < 1:
        raise InvalidInput.field(field, 'a whole number ≥ 1 or "auto"')
    return GroupCount(value)


def moment(value: Any, field: str = "since") -> datetime:
    """An ISO 8601 time in the past (UTC when it names no zone), at most 64 characters."""
    try:
        at = datetime.fromisoformat(value) if isinstance(value, str) and len(value) <= 64 \
            else None
    except ValueError:
        at = None
    if at is None:
        raise InvalidInput.field(field, "an ISO 8601 time, e.g. 2024-05-01T08:00:00Z")
    at = at if at.tzinfo is not None else at.replace(tzinfo=timezone.utc)
    if at > datetime.now(timezone.utc):
        raise InvalidInput.field(field, "a time in the past")
    return at


def reason(value: Any, field: str = "reason") -> Reason:
    if not isinstance(value, str) or len(value) > MAX_REASON:
        raise InvalidInput.field(field, f"a string of at most {MAX_REASON} characters")
    return Reason(value)


def fit_status(value: Any, field: str = "status") -> FitStatus:
    if not isinstance(value, str) or value not in FitStatus._value2member_map_:
        raise InvalidInput.field(field, "one of " + ", ".join(s.value for s in FitStatus))
    return FitStatus(value)


# --- a metric's definition (the deployment's own limits are the use case's) --------

def feature_names(value: Any, field: str = "features") -> list[str]:
    """A non-empty list of unique names, each 1-128 printable characters without
    surrounding spaces; a list over the hard cap is refused by its count alone."""
    if not isinstance(value, list) or not value:
        raise InvalidInput.field(field, "must be a non-empty list of names")
    if len(value) > MAX_FEATURES:
        raise InvalidInput.field(field, f"At most {MAX_FEATURES} items.")
    for i, f in enumerate(value):
        if not isinstance(f, str) or not FEATURE_RE.fullmatch(f) or f != f.strip():
            raise InvalidInput.field(
                f"{field}[{i}]", "names are 1-128 printable characters, no surrounding spaces")
    if len(set(value)) != len(value):
        raise InvalidInput.field(field, "names must be unique")
    return list(value)


def level_map(value: Any, field: str = "categories") -> dict[str, list[str]]:
    """``{feature: [level, ...]}``: each list non-empty, of unique non-empty names."""
    if not isinstance(value, dict):
        raise InvalidInput.field(field, "an object of feature: [level, ...]")
    for name, levels in value.items():
        where = f"{field}.{name}"
        if (not isinstance(levels, list) or not levels or len(levels) > MAX_FEATURES
                or not all(isinstance(v, str) and 0 < len(v) <= 128 for v in levels)):
            raise InvalidInput.field(where, "a non-empty list of level names")
        if len(set(levels)) != len(levels):
            raise InvalidInput.field(where, "level names must be unique")
    return {name: list(levels) for name, levels in value.items()}


def description(value: Any, field: str = "description") -> str:
    if not isinstance(value, str) or len(value) > MAX_DESCRIPTION:
        raise InvalidInput.field(field, f"a string of at most {MAX_DESCRIPTION} characters")
    return value


def missing_policy(value: Any, field: str = "missing_values") -> str:
    if not isinstance(value, str) or value not in MISSING_POLICIES:
        raise InvalidInput.field(field, "one of " + ", ".join(MISSING_POLICIES))
    return value


# --- fit parameters ---------------------------------------------------------------

METHODS = ("auto", *LEARNERS)  # a new learner registered in the core is offered here
# when_better: only if it scores at least the active version on the same folds;
# at_once: whatever its score; by_hand: stored, activated later by a person
ACTIVATE = ("when_better", "at_once", "by_hand")
# the names the options had before (FORMER_ACTIVATE) are refused with a 422 naming the
# new one, never aliased; stored fit records that carry them read under the new names
MAX_ALPHAS = 32
# the whole-number parameters: (lowest, highest, may be null)
INT_RANGES: dict[str, tuple[int, int, bool]] = {
    "n_folds": (2, 20, False), "max_rank": (1, 10_000, True),
    "k_max": (2, 50, False), "seed": (0, 2**32 - 1, True),
}


@dataclass(frozen=True)
class FitParams:
    """A fit's parameters, whole and canonical (``alphas`` sorted, without repeats)."""

    method: str = "auto"
    activate: str = "when_better"
    alphas: tuple[float, ...] | None = None
    n_folds: int = 5
    max_rank: int | None = None
    k_max: int = 10
    seed: int | None = 0

    def as_dict(self) -> dict[str, Any]:
        """JSON-safe, as stored in the fit record (and hashed to spot a repeat)."""
        out = asdict(self)
        if self.alphas is not None:
            out["alphas"] = list(self.alphas)
        return out

    @classmethod
    def parse(cls, params: Mapping[str, Any] | None = None) -> FitParams:
        """Every given parameter read by its rule (:data:`FIT_FIELDS`), the rest defaults;
        all the faults at once."""
        params = dict(params or {})
        errors = [{"field": u, "message": "unknown parameter"}
                  for u in sorted(set(params) - set(FIT_FIELDS))]
        read: dict[str, Any] = {}
        for key, value in params.items():
            if key in FIT_FIELDS:
                try:
                    read[key] = FIT_FIELDS[key](value)
                except InvalidInput as exc:
                    errors.extend(exc.errors)
        if errors:
            named = ", ".join(e["field"] for e in errors)
            raise InvalidInput(f"invalid fit parameter(s): {named}", errors)
        return cls(**read)


def activate_message(given: Any) -> str:
    """What to say about an activation policy that is not one of ours."""
    choices = "one of " + ", ".join(ACTIVATE)
    if isinstance(given, str) and given in FORMER_ACTIVATE:
        return f"{given!r} is now called {FORMER_ACTIVATE[given]!r}; {choices}"
    return choices


def _method(value: Any) -> str:
    if not isinstance(value, str) or value not in METHODS:
        raise InvalidInput.field("method", "one of " + ", ".join(METHODS))
    return value


def _activate(value: Any) -> str:
    if not isinstance(value, str) or value not in ACTIVATE:
        raise InvalidInput.field("activate", activate_message(value))
    return value


def _positive(value: Any) -> bool:
    return (isinstance(value, (int, float)) and not isinstance(value, bool)
            and math.isfinite(value) and value > 0)


def _alphas(value: Any) -> tuple[float, ...] | None:
    if value is None:
        return None
    if not isinstance(value, list):
        raise InvalidInput.field("alphas", f"a list of 1 to {MAX_ALPHAS} positive numbers")
    bad = [{"field": f"alphas[{i}]", "message": "a finite number greater than 0"}
           for i, a in enumerate(value) if not _positive(a)]
    if bad:
        raise InvalidInput(bad[0]["message"], bad)
    if not 1 <= len(value) <= MAX_ALPHAS:
        raise InvalidInput.field("alphas", f"a list of 1 to {MAX_ALPHAS} positive numbers")
    return tuple(sorted({float(a) for a in value}))


def _int_rule(key: str) -> Callable[[Any], int | None]:
    lo, hi, optional = INT_RANGES[key]
    default = getattr(FitParams, key)  # what null means, where null is allowed

    def read(value: Any) -> int | None:
        if value is None and optional:
            return default
        if not _whole(value) or not lo <= value <= hi:
            raise InvalidInput.field(key, f"a whole number from {lo} to {hi}"
                                     + (" or null" if optional else ""))
        return int(value)
    return read


# one rule per fit parameter, in FitParams' order
FIT_FIELDS: dict[str, Callable[[Any], Any]] = {
    "method": _method, "activate": _activate, "alphas": _alphas,
    **{key: _int_rule(key) for key in INT_RANGES},
}
