"""The error type request handlers raise (the app turns it into the JSON error body), and
the one a socket deadline raises."""

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


class ClientTooSlow(TimeoutError):
    """A client that did not send its request, or take its answer, within the worker's
    deadline (:mod:`service.threaded_worker`); reading a body it ends in a 408."""
