"""The one JSON error object of the web app and its stable codes.

Routers and the app's exception handlers both build answers from here, so no
router imports the app factory.
"""

from __future__ import annotations

from app.store.errors import StoreError

#: The stable error codes of JSON answers (documented in the README), one per kind.
ERROR_CODES = ("not_signed_in", "forbidden", "form_expired", "not_found",
               "method_not_allowed", "invalid_request", "invalid_field", "permission_denied",
               "self_decision", "decision_conflict", "upload_too_large", "storage_full",
               "http_error")


def store_error_code(exc: StoreError) -> str:
    """The snake_case code of a store error (its class name without ``Error``)."""
    name = type(exc).__name__.removesuffix("Error")
    snake = "".join("_" + c.lower() if c.isupper() else c for c in name).lstrip("_")
    return {"validation": "invalid_field"}.get(snake, snake or "invalid_field")


def error_body(code: str, message: str, **extra: object) -> dict:
    """The one error object every JSON answer uses: ``{"error": {"code", "message"}}``."""
    return {"error": {"code": code, "message": message, **extra}}
