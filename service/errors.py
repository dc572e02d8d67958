"""Errors meant for people: ApiError, which request handlers raise and the app turns into
the JSON error body; UserError, a value given by the user (an option, an environment
variable, a data cell) that cannot be used; and ClientTooSlow, what a socket deadline
raises."""

from __future__ import annotations

from service.schemas import ErrorResponse


class UserError(ValueError):
    """Something the user can fix (bad input, bad option): the command line shows it as one
    line with exit status 2, never with a traceback. A ValueError, so that code validating
    values may catch both alike."""


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
