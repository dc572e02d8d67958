"""The one error type request handlers raise; the app turns it into the JSON error body."""

from __future__ import annotations

from service.schemas import ErrorResponse


class ApiError(Exception):
    """A 4xx answer: ``{"error": {"code", "message", "details"}}``."""

    def __init__(self, status: int, code: str, message: str, details=None):
        super().__init__(message)
        self.status = status
        self.code = code
        self.message = message
        self.details = details

    def body(self) -> dict:
        """The error body, through :class:`~service.schemas.ErrorResponse` (the document's)."""
        return ErrorResponse.model_validate({"error": {
            "code": self.code, "message": self.message, "details": self.details}}).model_dump()
