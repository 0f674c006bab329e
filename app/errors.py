"""Exceptions a user can cause, with messages a person can act on."""

from __future__ import annotations


class RawproofError(Exception):
    """Base class of the project's own errors."""


class InputError(RawproofError, ValueError):
    """An input that cannot be read as a candidate dataset.

    Parameters
    ----------
    code : str
        A short machine-readable code, for example ``"unreadable"``,
        ``"unsupported_format"``, ``"unsafe_archive"``, ``"empty"``, ``"too_large"``.
    message : str
        One sentence a person can act on.
    path : str, optional
        The file or archive member at fault.
    """

    def __init__(self, code: str, message: str, path: str | None = None) -> None:
        super().__init__(message)
        self.code = code
        self.message = message
        self.path = path

    def to_dict(self) -> dict:
        return {"code": self.code, "message": self.message, "path": self.path}
