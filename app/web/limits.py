"""Request limits applied before a route reads anything: body caps, sign-in first, timeouts.

:class:`RequestLimitsMiddleware` (pure ASGI, outermost) decides from the
method, the path and the headers alone:

- **who is asking**: a request with a body to any route that needs a member
  must carry a valid session cookie or API token, checked against the
  database before one byte of the body is read (pages are redirected to the
  sign-in form, JSON callers get 401);
- **CSRF before the body**: a cookie-authenticated JSON body needs its
  ``X-CSRF-Token`` header now (forms carry their token inside a body that is
  already capped small; the upload stream checks its token before any file);
- **how much it may send**: :func:`body_cap` per route (uploads: the upload
  limit plus :data:`FIELDS_ALLOWANCE`; the sign-in form and everything else:
  :data:`SMALL_BODY`). A declared ``Content-Length`` above the cap is refused
  with 413 at once; a chunked body is counted and cut at the cap (RFC 9110,
  15.5.14: 413 Content Too Large);
- **how long it may stall**: each body chunk must arrive within
  :data:`BODY_IDLE_SECONDS` or the request ends with 408 (RFC 9110, 15.5.9)
  and every partial upload file is removed.

:class:`HeaderTimeoutH11Protocol` is uvicorn's HTTP protocol, closing a
connection that does not complete its request headers within
:data:`HEADER_SECONDS` of its opening (or of the previous response), so slow
header senders cannot hold connections.
"""

from __future__ import annotations

import asyncio
import json
import os
from typing import Any

from starlette.concurrency import run_in_threadpool
from starlette.types import ASGIApp, Message, Receive, Scope, Send
from uvicorn.protocols.http.h11_impl import H11Protocol

#: body cap of every route that is not an upload (comments, decisions, forms, sign-in)
SMALL_BODY = 1024**2
#: room for the form fields of an upload, on top of the upload limit
FIELDS_ALLOWANCE = 1024**2
#: routes whose body is a streamed upload
UPLOAD_PATHS = ("/upload", "/api/uploads")
#: routes anyone may send a body to (the sign-in form)
PUBLIC_BODY_PATHS = ("/login",)
HEADER_SECONDS = float(os.environ.get("RAWPROOF_HEADER_TIMEOUT", 10))
BODY_IDLE_SECONDS = float(os.environ.get("RAWPROOF_BODY_IDLE_TIMEOUT", 30))

_BODY_METHODS = {"POST", "PUT", "PATCH", "DELETE"}


def body_cap(path: str, max_upload_bytes: int) -> int:
    """The largest body ``path`` accepts, in bytes."""
    if path in UPLOAD_PATHS:
        return max_upload_bytes + FIELDS_ALLOWANCE
    return SMALL_BODY


#: how far into a multipart body the first field (the CSRF token) must be complete
_FIRST_FIELD_BYTES = 8 * 1024


async def _first_field_token(receive: Receive, content_type: str, expected: str | None
                             ) -> tuple[Receive, bool]:
    """Read the start of a multipart body and check that its first field is the CSRF token.

    Returns a ``receive`` that replays what was read, and whether the token
    matched. At most :data:`_FIRST_FIELD_BYTES` are read for the check
    (RFC 7578: parts in the order of the form; the token field comes first).
    """
    import re

    from app.web.security import CSRF_FIELD, CsrfError, check_csrf

    m = re.search(r'boundary="?([^";]+)"?', content_type)
    if m is None:
        return receive, False
    delimiter = b"\r\n--" + m.group(1).encode("latin-1")
    buf = b""
    more = True
    held: list[Message] = []
    field_name = b'name="' + CSRF_FIELD.encode() + b'"'
    ok = False
    while more and len(buf) < _FIRST_FIELD_BYTES:
        message = await asyncio.wait_for(receive(), BODY_IDLE_SECONDS)
        held.append(message)
        if message["type"] != "http.request":
            break
        buf += message.get("body", b"")
        more = message.get("more_body", False)
        head, sep, rest = buf.partition(b"\r\n\r\n")
        if not sep:
            continue
        if field_name not in head:
            break  # the first part is not the token
        end = rest.find(delimiter)
        if end >= 0:
            try:
                check_csrf(expected, rest[:end].decode("utf-8", "replace"))
                ok = True
            except CsrfError:
                ok = False
            break
    pending = list(held)

    async def replay() -> Message:
        if pending:
            return pending.pop(0)
        return await receive()

    return replay, ok


class _Cut(Exception):  # noqa: N818 - a control-flow signal, not an error
    def __init__(self, status: int) -> None:
        self.status = status


def _headers(scope: Scope) -> dict[str, str]:
    return {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope["headers"]}


def _wants_json(path: str, headers: dict[str, str]) -> bool:
    return (path.startswith("/api/") or "application/json" in headers.get("accept", "")
            or headers.get("authorization", "").lower().startswith("bearer "))


async def _send_error(send: Send, status: int, code: str, message: str, *,
                      json_body: bool, extra: list[tuple[bytes, bytes]] | None = None) -> None:
    if json_body:
        body = json.dumps({"error": {"code": code, "message": message}}).encode()
        ctype = b"application/json"
    else:
        body = message.encode()
        ctype = b"text/plain; charset=utf-8"
    headers = [(b"content-type", ctype), (b"content-length", str(len(body)).encode()),
               (b"connection", b"close"), *(extra or [])]
    await send({"type": "http.response.start", "status": status, "headers": headers})
    await send({"type": "http.response.body", "body": body})


def _authenticate(app_state: Any, headers: dict[str, str], cookies: dict[str, str]
                  ) -> tuple[str, str | None] | None:
    """("token", None) or ("session", csrf token) for valid credentials, else None."""
    from app.store import service
    from app.web.security import SESSION_COOKIE

    auth = headers.get("authorization", "")
    scheme, _, token = auth.partition(" ")
    session = app_state.database.session(write=False)
    try:
        if scheme.lower() == "bearer" and token.strip():
            return ("token", None) if service.user_for_api_token(session, token.strip()) else None
        sess = service.web_session_for(session, cookies.get(SESSION_COOKIE))
        return ("session", sess.csrf_token) if sess is not None else None
    finally:
        session.close()


def _cookies(headers: dict[str, str]) -> dict[str, str]:
    out: dict[str, str] = {}
    for part in headers.get("cookie", "").split(";"):
        key, sep, value = part.strip().partition("=")
        if sep:
            out.setdefault(key, value)
    return out


class RequestLimitsMiddleware:
    """See the module docstring. ``max_upload_bytes`` comes from the app's settings."""

    def __init__(self, app: ASGIApp, *, max_upload_bytes: int) -> None:
        self.app = app
        self.max_upload_bytes = max_upload_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] not in _BODY_METHODS:
            await self.app(scope, receive, send)
            return
        path = scope["path"]
        headers = _headers(scope)
        json_body = _wants_json(path, headers)
        cap = body_cap(path, self.max_upload_bytes)
        if path not in PUBLIC_BODY_PATHS:
            who = await run_in_threadpool(_authenticate, scope["app"].state, headers,
                                          _cookies(headers))
            if who is None:
                await self._not_signed_in(send, path, headers, json_body)
                return
            kind, csrf = who
            ctype = headers.get("content-type", "")
            is_form = ctype.startswith(("application/x-www-form-urlencoded",
                                        "multipart/form-data"))
            from app.web.security import CSRF_HEADER, CsrfError, check_csrf

            multipart_token = (kind == "session" and headers.get(CSRF_HEADER) is None
                               and ctype.startswith("multipart/form-data"))
            if kind == "session" and not is_form:
                try:
                    check_csrf(csrf, headers.get(CSRF_HEADER))
                except CsrfError as exc:
                    await _send_error(send, 403, "csrf_failed", str(exc), json_body=json_body)
                    return
            if multipart_token:
                # the token must be the form's first field: read just that far
                receive, ok = await _first_field_token(receive, ctype, csrf)
                if not ok:
                    await _send_error(send, 403, "csrf_failed", "The form has expired or did "
                                      "not come from this site. Reload and retry.",
                                      json_body=json_body)
                    return
        length = headers.get("content-length", "")
        if length.isdigit() and int(length) > cap:
            await _send_error(send, 413, "body_too_large",
                              f"The request body is larger than the {cap} bytes this address "
                              "accepts; nothing was stored.", json_body=json_body)
            return
        await self._guarded(scope, receive, send, cap, json_body)

    async def _not_signed_in(self, send: Send, path: str, headers: dict[str, str],
                             json_body: bool) -> None:
        if json_body:
            await _send_error(send, 401, "not_signed_in", "Sign in to continue.",
                              json_body=True, extra=[(b"www-authenticate", b"Bearer")])
            return
        from urllib.parse import quote, urlsplit

        from app.web.security import safe_next

        target = safe_next(urlsplit(headers.get("referer", "")).path or "/")
        location = f"/login?next={quote(target, safe='')}".encode()
        await send({"type": "http.response.start", "status": 303,
                    "headers": [(b"location", location), (b"content-length", b"0"),
                                (b"connection", b"close")]})
        await send({"type": "http.response.body", "body": b""})

    async def _guarded(self, scope: Scope, receive: Receive, send: Send, cap: int,
                       json_body: bool) -> None:
        state = {"received": 0, "cut": None, "started": False}

        async def limited_receive() -> Message:
            if state["cut"] is not None:
                return {"type": "http.disconnect"}
            try:
                message = await asyncio.wait_for(receive(), BODY_IDLE_SECONDS)
            except TimeoutError:
                state["cut"] = 408
                return {"type": "http.disconnect"}
            if message["type"] == "http.request":
                state["received"] += len(message.get("body", b""))
                if state["received"] > cap:
                    state["cut"] = 413
                    return {"type": "http.disconnect"}
            return message

        async def guarded_send(message: Message) -> None:
            if state["cut"] is not None:
                return  # the app's own answer to a cut body is replaced by ours
            if message["type"] == "http.response.start":
                state["started"] = True
            await send(message)

        try:
            await self.app(scope, limited_receive, guarded_send)
        except Exception:
            if state["cut"] is None:
                raise
        if state["cut"] is not None and not state["started"]:
            if state["cut"] == 413:
                await _send_error(send, 413, "body_too_large",
                                  f"The request body is larger than the {cap} bytes this "
                                  "address accepts; nothing was stored.", json_body=json_body)
            else:
                await _send_error(send, 408, "body_timeout",
                                  f"No part of the request body arrived for "
                                  f"{BODY_IDLE_SECONDS:.0f} s; nothing was stored.",
                                  json_body=json_body)


class HeaderTimeoutH11Protocol(H11Protocol):
    """uvicorn's h11 protocol, closing connections slow to send their request headers.

    A timer armed when the connection opens and after each response closes the
    connection unless a new request's headers have arrived within
    :data:`HEADER_SECONDS` (uvicorn starts a new request cycle on complete
    headers). Defined at module level so that ``serve --processes N`` can pass
    it to its worker processes.
    """

    def connection_made(self, transport):  # noqa: ANN001, ANN201
        super().connection_made(transport)
        self._arm_header_timer()

    def on_response_complete(self) -> None:
        super().on_response_complete()
        self._arm_header_timer()

    def _arm_header_timer(self) -> None:
        armed_cycle = self.cycle
        handle = getattr(self, "_header_timer", None)
        if handle is not None:
            handle.cancel()

        def expire() -> None:
            if self.cycle is armed_cycle and not self.transport.is_closing():
                self.transport.close()

        self._header_timer = self.loop.call_later(HEADER_SECONDS, expire)

    def connection_lost(self, exc):  # noqa: ANN001, ANN201
        handle = getattr(self, "_header_timer", None)
        if handle is not None:
            handle.cancel()
        super().connection_lost(exc)


#: errno values of a store that cannot be written (full disk, quota, read-only)
_FULL = {28, 122}   # ENOSPC, EDQUOT
_READ_ONLY = {30}   # EROFS


def storage_failure(exc: BaseException) -> tuple[int, str, str] | None:
    """(status, code, message) for a database or store write that failed, else None.

    A full disk answers 507 Insufficient Storage (RFC 4918, 11.5); a locked,
    read-only or otherwise unavailable database 503 Service Unavailable
    (RFC 9110, 15.6.4). The message never shows a path.
    """
    text = str(getattr(exc, "orig", None) or exc).lower()
    errno = getattr(exc, "errno", None)
    if errno in _FULL or "database or disk is full" in text or "no space left" in text:
        return (507, "storage_full", "The server's disk is full, so nothing was saved. "
                "Tell the lab admin; try again once space has been freed.")
    if errno in _READ_ONLY or "readonly" in text or "read-only" in text:
        return (503, "storage_read_only", "The server cannot write to its database or store "
                "right now, so nothing was saved. Tell the lab admin.")
    if "database is locked" in text or "disk i/o error" in text or "unable to open" in text:
        return (503, "database_unavailable", "The database is busy or unavailable, so "
                "nothing was saved. Try again in a moment.")
    return None
