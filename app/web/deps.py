"""Shared FastAPI dependencies: settings, database session, signed-in user, CSRF.

Routers declare ``dependencies=[Depends(current_user)]`` (or use it as a
parameter) so that every page needs a signed-in member; state-changing routes
add :func:`csrf_protect`.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session

from app.config import Settings
from app.store import service
from app.store.accounts import api_token_row
from app.store.db import Database
from app.store.models import User
from app.web.security import (
    CSRF_FIELD,
    CSRF_HEADER,
    SESSION_COOKIE,
    CsrfError,
    check_csrf,
    csrf_token,
)

__all__ = [
    "AdminUser",
    "CurrentUser",
    "DbSession",
    "SettingsDep",
    "StreamingUser",
    "CsrfError",
    "NotSignedInError",
    "csrf_protect",
    "csrf_token",
    "current_user",
    "get_db",
    "get_settings",
    "require_admin",
]


class NotSignedInError(Exception):
    """No valid session cookie or API token (pages redirect to sign-in, the API answers 401)."""


class ForbiddenError(Exception):
    """Signed in, but not allowed (for example, not an admin)."""


def get_settings(request: Request) -> Settings:
    return request.app.state.settings


def get_database(request: Request) -> Database:
    return request.app.state.database


def get_db(request: Request) -> Iterator[Session]:
    """A session per request; non-GET requests take the write lock from their first statement.

    Handlers that change data commit explicitly; closing rolls back anything
    left. (Closing, unlike ``rollback()``, keeps loaded attributes readable, so
    an error page rendered after the request can still show who is signed in.)
    """
    db: Database = request.app.state.database
    session = db.session(write=request.method not in ("GET", "HEAD", "OPTIONS"))
    try:
        yield session
    finally:
        session.close()


DbSession = Annotated[Session, Depends(get_db)]
SettingsDep = Annotated[Settings, Depends(get_settings)]


def _bearer(request: Request) -> str | None:
    auth = request.headers.get("authorization", "")
    scheme, _, token = auth.partition(" ")
    return token.strip() if scheme.lower() == "bearer" and token.strip() else None


def current_user(request: Request, db: DbSession) -> User:
    """The signed-in member: by API token (``Authorization: Bearer ...``) or session cookie."""
    cached = getattr(request.state, "user", None)
    if cached is not None:
        return cached
    token = _bearer(request)
    if token is not None:
        row = api_token_row(db, token)
        if row is None:
            raise NotSignedInError("That API token is unknown or revoked.")
        user = row.user
        request.state.auth = "token"
        request.state.api_token = row  # its scope is checked where tokens are made
    else:
        sess = service.web_session_for(db, request.cookies.get(SESSION_COOKIE))
        if sess is None:
            raise NotSignedInError("Sign in to continue.")
        request.state.auth = "session"
        request.state.web_session = sess
        user = sess.user
    request.state.user = user
    return user


CurrentUser = Annotated[User, Depends(current_user)]


def streaming_user(request: Request) -> User:
    """:func:`current_user` from a short read session of its own.

    For long streaming requests (uploads): the request's own session would
    hold the database's write lock for as long as the body takes to arrive.
    The returned user is detached; use its id in new sessions.
    """
    session = request.app.state.database.session(write=False)
    try:
        return current_user(request, session)
    finally:
        session.close()


StreamingUser = Annotated[User, Depends(streaming_user)]


def require_admin(user: CurrentUser) -> User:
    if not user.is_admin:
        raise ForbiddenError("Only a lab admin can manage accounts.")
    return user


async def csrf_protect(request: Request, user: CurrentUser) -> None:
    """Reject a cookie-authenticated state change without the session's CSRF token.

    The token comes from the ``X-CSRF-Token`` header or the ``csrf_token``
    form field. Bearer-token requests carry no cookie and need none.
    """
    if getattr(request.state, "auth", None) == "token":
        return
    supplied = request.headers.get(CSRF_HEADER)
    ctype = request.headers.get("content-type", "")
    if supplied is None and (ctype.startswith("application/x-www-form-urlencoded")
                             or ctype.startswith("multipart/form-data")):
        form = await request.form()
        value = form.get(CSRF_FIELD)
        supplied = value if isinstance(value, str) else None
    sess = getattr(request.state, "web_session", None)
    check_csrf(sess.csrf_token if sess else None, supplied)


AdminUser = Annotated[User, Depends(require_admin)]


#: The largest row id a database keeps (SQLite and PostgreSQL: signed 64-bit).
MAX_ROW_ID = 2**63 - 1


def parse_row_id(raw: str | None, field: str, *, empty: int | None = None) -> int | None:
    """A row id typed into a form field: digits, at most :data:`MAX_ROW_ID`.

    Empty gives ``empty``; anything else raises the store's ``ValidationError``
    (422) naming ``field``.
    """
    from app.store.errors import ValidationError

    raw = (raw or "").strip()
    if not raw:
        return empty
    if not (raw.isascii() and raw.isdigit()) or len(raw) > 19 or int(raw) > MAX_ROW_ID:
        raise ValidationError(f"{field} must be a whole number from 0 to {MAX_ROW_ID}.")
    return int(raw)


def out_of_range_fields(request: Request) -> list[str]:
    """The path parameters of ``request`` that are numbers too large for a row id.

    The database driver refuses such a number with ``OverflowError`` when the
    route looks it up; the error handler names these fields in its 422.
    """
    out = []
    for key, value in request.path_params.items():
        text = str(value)
        if text.isascii() and text.isdigit() and int(text) > MAX_ROW_ID:
            out.append(f"path.{key}")
    return out


def client_address(request: Request) -> str:
    return request.client.host if request.client else "unknown"
