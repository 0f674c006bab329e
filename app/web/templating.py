"""The shared Jinja2 environment (autoescape on) and the page render helper.

Other routers (including the evidence panel's) use :data:`templates`. Globals:
``caution`` (app.CAUTION), ``csrf_token(request)``, ``outcomes`` and the label
functions; filters ``filesize``, ``when``, ``trace_label``, ``status_label``.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from fastapi import Request
from fastapi.templating import Jinja2Templates
from starlette.responses import Response

import app
from app.store.models import OUTCOMES
from app.store.passwords import MIN_LENGTH as PASSWORD_MIN_LENGTH
from app.web import labels
from app.web.paths import TEMPLATES_DIR
from app.web.security import csrf_token

templates = Jinja2Templates(directory=str(TEMPLATES_DIR))
templates.env.autoescape = True


def filesize(n: int | None) -> str:
    """Bytes as a short human size (binary units)."""
    if n is None:
        return ""
    size = float(n)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if size < 1024 or unit == "TiB":
            return f"{size:.0f} {unit}" if unit == "B" else f"{size:.1f} {unit}"
        size /= 1024
    return f"{n} B"


def when(dt: datetime | None) -> str:
    return "" if dt is None else f"{dt:%Y-%m-%d %H:%M} UTC"


def day(dt: datetime | None) -> str:
    return "" if dt is None else f"{dt:%Y-%m-%d}"


templates.env.globals.update(
    caution=app.CAUTION,
    csrf_token=csrf_token,
    outcomes=OUTCOMES,
    version=app.__version__,
    # the password policy's length (app.store.passwords), so the forms state the rule in force
    password_min_length=PASSWORD_MIN_LENGTH,
    trace_label=labels.trace_label,
    status_label=labels.status_label,
    outcome_label=labels.outcome_label,
    verdict_label=labels.verdict_label,
)
templates.env.filters.update(
    filesize=filesize,
    when=when,
    day=day,
    trace_label=labels.trace_label,
    status_label=labels.status_label,
    outcome_label=labels.outcome_label,
    verdict_label=labels.verdict_label,
)


def render(request: Request, name: str, context: dict[str, Any] | None = None, *,
           status_code: int = 200) -> Response:
    """Render a page with ``user`` (the signed-in member, or None) in its context."""
    ctx = {"user": getattr(request.state, "user", None)}
    ctx.update(context or {})
    return templates.TemplateResponse(request, name, ctx, status_code=status_code)
