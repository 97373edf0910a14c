"""Service errors: one family, each carrying what an RFC 9457 problem body needs.

Use cases raise these; the HTTP layer turns them into ``application/problem+json``
(``type`` = ``urn:likewise:problem:<slug>``).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from service.core.errors import CoreError

PROBLEM_BASE = "urn:likewise:problem:"


class ServiceError(Exception):
    """Base class: ``status``, ``title``, ``slug``, ``detail``, ``errors``."""

    status: int = 500
    title: str = "Internal error"
    slug: str = "internal-error"

    def __init__(
        self,
        detail: str = "",
        errors: list[dict[str, str]] | None = None,
        *,
        title: str | None = None,
        slug: str | None = None,
    ) -> None:
        super().__init__(detail or self.title)
        self.detail = detail or self.title
        self.errors: list[dict[str, str]] = list(errors or [])
        if title is not None:
            self.title = title
        if slug is not None:
            self.slug = slug

    @property
    def type(self) -> str:
        return PROBLEM_BASE + self.slug

    def to_problem(self, instance: str | None = None) -> dict[str, Any]:
        """The problem-details body (without HTTP headers)."""
        body: dict[str, Any] = {
            "type": self.type,
            "title": self.title,
            "status": self.status,
            "detail": self.detail,
        }
        if instance is not None:
            body["instance"] = instance
        if self.errors:
            body["errors"] = [dict(e) for e in self.errors]
        return body


class MalformedRequest(ServiceError):
    status, title, slug = 400, "Malformed request", "malformed-request"


class Unauthorized(ServiceError):
    status, title, slug = 401, "Unauthorized", "unauthorized"


class Forbidden(ServiceError):
    """The token is valid but may not do this; ``missing_scope`` names what it lacks."""

    status, title, slug = 403, "Forbidden", "forbidden"

    def __init__(self, detail: str, missing_scope: str | None = None) -> None:
        super().__init__(detail)
        self.missing_scope = missing_scope

    def to_problem(self, instance: str | None = None) -> dict[str, Any]:
        body = super().to_problem(instance)
        if self.missing_scope is not None:
            body["missing_scope"] = self.missing_scope
        return body


class NotFound(ServiceError):
    status, title, slug = 404, "Not found", "not-found"


class Conflict(ServiceError):
    status, title, slug = 409, "Conflict", "conflict"


class PayloadTooLarge(ServiceError):
    status, title, slug = 413, "Payload too large", "payload-too-large"


class UnsupportedMediaType(ServiceError):
    status, title, slug = 415, "Unsupported media type", "unsupported-media-type"


class InvalidInput(ServiceError):
    status, title, slug = 422, "Invalid input", "invalid-input"

    @classmethod
    def field(cls, field: str, message: str, detail: str | None = None) -> InvalidInput:
        """One field-level error; ``detail`` defaults to the message."""
        return cls(detail or message, [{"field": field, "message": message}])


class Unavailable(ServiceError):
    status, title, slug = 503, "Service unavailable", "unavailable"


def from_core(exc: CoreError, default_field: str = "records") -> InvalidInput:
    """A core validation error as a 422 with one field-level error."""
    message = getattr(exc, "message", None) or str(exc)
    field = getattr(exc, "field", None) or default_field
    return InvalidInput(message, [{"field": field, "message": message}])
