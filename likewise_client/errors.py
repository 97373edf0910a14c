"""What the client raises: one type for the service's problem answers, a few of its own."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any


class ClientError(Exception):
    """Base of every error this package raises."""


@dataclass(frozen=True)
class FieldError:
    """One input at fault, as the service names it (``features[0]``, ``rows``, ``k`` …)."""

    field: str
    message: str


class ProblemError(ClientError):
    """An RFC 9457 problem answer (any 4xx or 5xx) from the service.

    ``status``, ``title`` and ``detail`` are the problem's members; ``errors`` the
    field errors of a validation failure (empty otherwise); ``body`` the whole problem,
    extension members included (``batch_id`` of a duplicate, ``missing_scope`` …).
    """

    def __init__(self, status: int, body: dict[str, Any], method: str, path: str) -> None:
        self.status = status
        self.body = body
        self.method, self.path = method, path
        self.type = str(body.get("type", "about:blank"))
        self.title = str(body.get("title", ""))
        self.detail = str(body.get("detail", ""))
        self.errors = [FieldError(str(e.get("field", "")), str(e.get("message", "")))
                       for e in body.get("errors") or [] if isinstance(e, dict)]
        fields = "; ".join(f"{e.field}: {e.message}" for e in self.errors)
        text = f"{method} {path} answered {status} {self.title}: {self.detail}"
        super().__init__(f"{text} ({fields})" if fields else text)

    def field(self, name: str) -> FieldError | None:
        """The error on field ``name``, if the service named it."""
        return next((e for e in self.errors if e.field == name), None)


class Unreachable(ClientError):
    """The service could not be reached (or kept dropping the connection) on every try."""


class FitTimeout(ClientError):
    """``wait_for_fit`` ran out of time before the fit ended."""

    def __init__(self, fit: dict[str, Any], timeout: float) -> None:
        self.fit = fit
        super().__init__(f"fit {fit.get('fit_id')} is still {fit.get('status')} after "
                         f"{timeout:g}s (progress {float(fit.get('progress') or 0):.0%})")


class GroupingRunTimeout(ClientError):
    """``wait_for_grouping_run`` ran out of time before the run ended."""

    def __init__(self, run: dict[str, Any], timeout: float) -> None:
        self.run = run
        super().__init__(f"grouping run {run.get('run_id')} is still {run.get('status')} "
                         f"after {timeout:g}s (progress {float(run.get('progress') or 0):.0%})")
