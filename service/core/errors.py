"""Domain errors of the maths core. The API turns them into 4xx problem details."""

from __future__ import annotations


class CoreError(ValueError):
    """Invalid input to the maths core.

    ``field`` names the input at fault in API terms (``"records"``, ``"groups"``,
    ``"k"``, ``"features"`` …) so that the HTTP layer can point at it.
    """

    def __init__(self, message: str, field: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.field = field


class NotEnoughDataError(CoreError):
    """Valid input, but too little of it for the requested operation."""


class RecordOverflowError(CoreError):
    """Finite records whose values overflow float64 once mapped; ``row`` is the first."""

    def __init__(self, message: str, row: int) -> None:
        super().__init__(message, "records")
        self.row = row


class ZeroSpreadWarning(UserWarning):
    """A feature has no spread within batches; it carries no signal and gets scale 1."""
