"""Sign-in rate limit: failed attempts per (address, name) and per address.

Counted from the audit trail that every sign-in already writes (``login.fail``
with the typed name and the address, ``login.ok`` with the account), so the
budget holds across server processes (``rawproof serve --processes N``) and
restarts, and needs no table of its own.
"""

from __future__ import annotations

import os
from datetime import timedelta

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store.models import AuditEvent, User, utcnow

#: the longest name an audit event keeps (app/web/routers/auth.py)
NAME_KEPT = 64


class RateLimited(Exception):  # noqa: N818 - reads as a state, like "Forbidden"
    """Too many failed sign-ins; ``retry_after`` is in seconds."""

    def __init__(self, retry_after: int) -> None:
        super().__init__(f"Too many failed sign-ins. Try again in {retry_after} s.")
        self.retry_after = retry_after


class LoginLimiter:
    """Sliding-window count of failed sign-ins, read from the audit events.

    Parameters
    ----------
    max_failures : int
        Failures allowed per (address, name) within ``window`` seconds (a
        successful sign-in to that name from that address starts the count
        again); an address alone gets five times as many across names.
    window : float
        Seconds.
    """

    def __init__(self, max_failures: int | None = None, window: float | None = None) -> None:
        self.max_failures = max_failures or int(os.environ.get("RAWPROOF_LOGIN_MAX_FAILURES", 8))
        self.window = window or float(os.environ.get("RAWPROOF_LOGIN_WINDOW", 600))

    def check(self, session: Session, address: str, name: str) -> None:
        """Raise :class:`RateLimited` when this address or (address, name) is over its budget.

        ``session`` may be a read session: nothing is written here (the caller
        records the attempt as an audit event).
        """
        now = utcnow()
        since = now - timedelta(seconds=self.window)
        wanted = name[:NAME_KEPT].lower()
        rows = session.execute(
            select(AuditEvent.at, AuditEvent.action, AuditEvent.detail, User.name)
            .outerjoin(User, AuditEvent.actor_id == User.id)
            .where(AuditEvent.at >= since,
                   AuditEvent.action.in_(("login.fail", "login.ok")))
            .order_by(AuditEvent.id)
        ).all()
        by_name: list = []
        by_address: list = []
        for at, action, detail, account in rows:
            d = detail or {}
            if d.get("address") != address:
                continue
            if action == "login.fail":
                by_address.append(at)
                if str(d.get("name") or "").lower() == wanted:
                    by_name.append(at)
            elif (account or "").lower() == wanted:
                by_name.clear()
        for times, limit in ((by_name, self.max_failures), (by_address, self.max_failures * 5)):
            if len(times) >= limit:
                oldest = times[len(times) - limit]
                wait = (oldest + timedelta(seconds=self.window) - now).total_seconds()
                raise RateLimited(int(max(0.0, wait)) + 1)
