"""Rendered pages kept until the database changes.

The registry and a dataset page are the pages a lab group reads most, and
rendering them costs more than the database reads behind them. A rendered page
is kept per (server database, path and query, signed-in web session) and used
until :func:`app.store.registry.change_key` changes: every user-made change
writes an audit event, and the worker's reports, job states and heartbeats are
counted directly. The web session in the key carries the member (and their
CSRF token, which the page's forms embed). Per process, at most
:data:`MAX_BYTES` of pages, least recently used first out.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable

from fastapi import Request
from fastapi.responses import HTMLResponse
from sqlalchemy.orm import Session
from starlette.responses import Response

from app.store.registry import change_key

#: kept pages per process, in bytes (a registry page of 100 rows is about 130 kB)
MAX_BYTES = 16 << 20

_PAGES: OrderedDict[tuple, bytes] = OrderedDict()
_LOCK = threading.Lock()
_size = 0


def cached_page(request: Request, db: Session, build: Callable[[], Response], *,
                extra_key: tuple = ()) -> Response:
    """``build()``'s page, or the copy rendered at the same database state.

    Requests signed in by API token (no web session) are always built fresh.
    ``extra_key`` is state outside the database the page shows (the queue's
    health, read from the workers' status files).
    """
    sess = getattr(request.state, "web_session", None)
    if sess is None:
        return build()
    key = (str(db.get_bind().url), request.url.path, request.url.query, sess.id,
           change_key(db), extra_key)
    with _LOCK:
        body = _PAGES.get(key)
        if body is not None:
            _PAGES.move_to_end(key)
    if body is not None:
        return HTMLResponse(body)
    resp = build()
    if resp.status_code == 200 and (resp.media_type or "").startswith("text/html"):
        _keep(key, bytes(resp.body))
    return resp


def _keep(key: tuple, body: bytes) -> None:
    global _size
    if len(body) > MAX_BYTES:
        return
    with _LOCK:
        old = _PAGES.pop(key, None)
        _size -= len(old) if old is not None else 0
        _PAGES[key] = body
        _size += len(body)
        while _size > MAX_BYTES:
            _, dropped = _PAGES.popitem(last=False)
            _size -= len(dropped)


def kept_bytes() -> int:
    """Bytes of pages kept now."""
    with _LOCK:
        return _size


def clear() -> None:
    """Forget every kept page (tests)."""
    global _size
    with _LOCK:
        _PAGES.clear()
        _size = 0
