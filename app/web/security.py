"""Cookies, CSRF tokens and security headers.

CSRF: a signed-in browser's session row holds a random token that every
state-changing form carries (``csrf_token`` field or ``X-CSRF-Token``
header). Before sign-in, the login form uses a double-submit cookie. API
requests authenticated by a bearer token are not cookie-borne and need none.
"""

from __future__ import annotations

import re
import secrets

from starlette.datastructures import MutableHeaders
from starlette.requests import Request
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from app.store.passwords import same

SESSION_COOKIE = "rawproof_session"
LOGIN_CSRF_COOKIE = "rawproof_login_csrf"
CSRF_FIELD = "csrf_token"
CSRF_HEADER = "x-csrf-token"

CSP = (
    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "font-src 'self'; connect-src 'self'; object-src 'none'; base-uri 'none'; "
    "form-action 'self'; frame-ancestors 'none'"
)
SECURITY_HEADERS = {
    "content-security-policy": CSP,
    "x-content-type-options": "nosniff",
    "referrer-policy": "same-origin",
    "x-frame-options": "DENY",
    "cross-origin-opener-policy": "same-origin",
    "permissions-policy": "camera=(), microphone=(), geolocation=()",
}


class CsrfError(Exception):
    """A state-changing request without a valid CSRF token."""


def csrf_token(request: Request) -> str:
    """The CSRF token forms on this page must carry (session's, or the login cookie's)."""
    sess = getattr(request.state, "web_session", None)
    if sess is not None:
        return sess.csrf_token
    token = getattr(request.state, "login_csrf", None)
    if token is None:
        token = request.cookies.get(LOGIN_CSRF_COOKIE) or secrets.token_urlsafe(24)
        request.state.login_csrf = token
    return token


def check_csrf(expected: str | None, supplied: str | None) -> None:
    """Raise :class:`CsrfError` unless ``supplied`` equals ``expected`` (constant time)."""
    if not expected or not supplied or not same(expected, supplied):
        raise CsrfError("The form has expired or did not come from this site. Reload and retry.")


def cookie_args(secure: bool) -> dict:
    return {"httponly": True, "samesite": "lax", "secure": bool(secure), "path": "/"}


def safe_next(target: str | None) -> str:
    """A local redirect target (path on this site), else ``/``."""
    if not target or not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/"
    return target


_SAFE_NAME = re.compile(r"[^A-Za-z0-9._-]+")


def attachment_name(name: str) -> str:
    """A download file name with only safe characters (no path, no quotes)."""
    base = name.replace("\\", "/").rsplit("/", 1)[-1]
    cleaned = _SAFE_NAME.sub("_", base).strip("._") or "download"
    return cleaned[:150]


class SecurityHeadersMiddleware:
    """Adds the security headers to every HTTP response (pages, JSON, static, errors)."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = MutableHeaders(scope=message)
                for key, value in SECURITY_HEADERS.items():
                    if key not in headers:
                        headers[key] = value
                if "cache-control" not in headers and not scope["path"].startswith("/static/"):
                    headers["cache-control"] = "no-store"
            await send(message)

        await self.app(scope, receive, send_with_headers)
