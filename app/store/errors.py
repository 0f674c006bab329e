"""Errors the store raises for things a person did (not programming errors)."""

from __future__ import annotations

from app.errors import RawproofError


class StoreError(RawproofError):
    """Base of the store's user-facing errors; ``message`` is one actionable sentence."""

    status_code = 400
    title = "Cannot do that"

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message


class NotFoundError(StoreError):
    """The dataset, report, file or user does not exist."""

    status_code = 404
    title = "Not found"


class PermissionDeniedError(StoreError):
    """The member may not do this (for example, decide on their own dataset)."""

    status_code = 403
    title = "Not allowed"


class SelfDecisionError(PermissionDeniedError):
    """The uploader tried to record the decision on their own dataset."""


class DecisionConflictError(StoreError):
    """Another reviewer recorded a decision since this reviewer loaded the page.

    Attributes
    ----------
    current : object
        The decision row that is now current (the new state to show).
    """

    status_code = 409
    title = "Someone else changed this"

    def __init__(self, message: str, current: object | None = None) -> None:
        super().__init__(message)
        self.current = current


class ValidationError(StoreError):
    """A form field is missing or malformed."""

    status_code = 422
    title = "Please check the form"


class SchemaError(RawproofError):
    """The database schema is newer than this rawproof (or otherwise unusable)."""

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.message = message
