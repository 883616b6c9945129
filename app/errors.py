"""Domain errors users can cause; one handler in main.py maps them to HTTP responses."""

from __future__ import annotations


class ExpertloopError(Exception):
    """An error with a message a person can act on, and the HTTP status it maps to."""

    status_code = 400

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


class NotFound(ExpertloopError):
    status_code = 404


class Conflict(ExpertloopError):
    status_code = 409


class InvalidInput(ExpertloopError):
    status_code = 422


class TooLarge(ExpertloopError):
    status_code = 413


class Unauthenticated(ExpertloopError):
    status_code = 401


class Forbidden(ExpertloopError):
    status_code = 403
