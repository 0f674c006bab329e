"""Sign-in rate limit: a growing delay per account and per address, not a lock-out.

Every password check (sign-in, and the current password on ``/account/password``)
first reserves its attempt: one transaction, holding the database's write lock,
counts the recent attempts and, if one is allowed now, writes a
``login.attempt`` audit event. Parallel guesses therefore cannot all pass the
count before any of them is recorded (issue 21, finding 4), and the count holds
across server processes (``rawproof serve --processes N``) and restarts.

The first ``max_failures`` attempts on an account within ``window`` seconds are
free; after that each further attempt must wait ``delay * 2**k`` seconds (k = 0,
1, ...; at most ``max_delay``) after the previous one. A refused attempt checks
no password and reserves nothing, so it does not lengthen the wait: the real
member, whose colleagues share one address, is slowed down, never locked out,
and signs in with the right password once the stated wait is over. A
successful sign-in or a new password (an admin's reset on the admin page, the
documented way to clear the count at once) starts the account's count again.
An address gets five times the account budget across all names; a success
takes its own attempt off that count.

References
----------
NIST Special Publication 800-63B, section 5.2.2 (Rate Limiting (Throttling)):
delays that grow with consecutive failures rather than a permanent lock-out.
"""

from __future__ import annotations

import os
from datetime import datetime, timedelta

from sqlalchemy import select, text
from sqlalchemy.orm import Session

from app.store.audit import audit
from app.store.db import Database
from app.store.models import AuditEvent, User, utcnow

#: the longest name an audit event keeps (app/web/routers/auth.py)
NAME_KEPT = 64
#: an address's budget, in account budgets
ADDRESS_FACTOR = 5


class RateLimited(Exception):  # noqa: N818 - reads as a state, like "Forbidden"
    """Too many recent password checks; ``retry_after`` is in whole seconds."""

    def __init__(self, retry_after: int) -> None:
        super().__init__(f"Too many failed sign-ins. Try again in {retry_after} s.")
        self.retry_after = retry_after


def _env_float(name: str, default: float) -> float:
    try:
        return float(os.environ.get(name, default))
    except ValueError:
        return default


class LoginLimiter:
    """Reserve password checks against the audit trail (see the module docstring).

    Parameters
    ----------
    max_failures : int
        Free attempts per account within ``window`` (environment
        ``RAWPROOF_LOGIN_MAX_FAILURES``, default 8).
    window : float
        Seconds an attempt counts for (``RAWPROOF_LOGIN_WINDOW``, default 600).
    delay : float
        The first wait after the free attempts, doubled each further attempt
        (``RAWPROOF_LOGIN_DELAY``, default 2 s).
    max_delay : float
        The longest wait (``RAWPROOF_LOGIN_MAX_DELAY``, default 60 s).
    """

    def __init__(self, max_failures: int | None = None, window: float | None = None,
                 delay: float | None = None, max_delay: float | None = None) -> None:
        self.max_failures = max_failures or int(_env_float("RAWPROOF_LOGIN_MAX_FAILURES", 8))
        self.window = window or _env_float("RAWPROOF_LOGIN_WINDOW", 600)
        self.delay = delay or _env_float("RAWPROOF_LOGIN_DELAY", 2)
        self.max_delay = max_delay or _env_float("RAWPROOF_LOGIN_MAX_DELAY", 60)

    # ------------------------------------------------------------------ the rule
    def wait_for(self, attempts: list[datetime], budget: int, now: datetime) -> float:
        """Seconds until one more attempt is allowed, given the counted attempt times."""
        extra = len(attempts) - budget
        if extra < 0:
            return 0.0
        wait = min(self.delay * 2.0 ** extra, self.max_delay)
        return (attempts[-1] + timedelta(seconds=wait) - now).total_seconds()

    def _counted(self, session: Session, address: str, name: str, now: datetime
                 ) -> tuple[list[datetime], list[datetime]]:
        """Attempt times on this account (any address) and from this address (any name)."""
        since = now - timedelta(seconds=self.window)
        wanted = name[:NAME_KEPT].lower()
        rows = session.execute(
            select(AuditEvent.at, AuditEvent.action, AuditEvent.detail, User.name)
            .outerjoin(User, AuditEvent.actor_id == User.id)
            .where(AuditEvent.at >= since,
                   AuditEvent.action.in_(("login.attempt", "login.ok", "user.password")))
            .order_by(AuditEvent.id)
        ).all()
        by_name: list[datetime] = []
        by_address: list[tuple[datetime, str]] = []  # (time, name) of attempts from here

        def succeeded(who: str) -> None:
            # a success takes its own attempt off the address's count (spraying many
            # names is what that count is for), and clears the account's count
            for i in range(len(by_address) - 1, -1, -1):
                if by_address[i][1] == who:
                    del by_address[i]
                    break
            if who == wanted:
                by_name.clear()

        for at, action, detail, actor in rows:
            d = detail or {}
            if action == "login.attempt":
                who = str(d.get("name") or "").lower()
                if who == wanted:
                    by_name.append(at)
                if d.get("address") == address:
                    by_address.append((at, who))
            elif action == "login.ok":
                succeeded((actor or "").lower())
            elif action == "user.password":
                succeeded(str(d.get("user") or "").lower())
        return by_name, [at for at, _ in by_address]

    # ------------------------------------------------------------------ use
    def reserve(self, database: Database, address: str, name: str, *,
                kind: str = "sign-in") -> None:
        """Count and, if allowed, record one password check, in one write transaction.

        Raises
        ------
        RateLimited
            When the account or the address must wait; nothing is reserved (the
            caller records the refusal, which the audit trail aggregates).
        """
        with database.scope(write=True) as session:
            if not database.url.startswith("sqlite"):
                # SQLite's BEGIN IMMEDIATE already serialises writers; elsewhere,
                # take a lock that makes count-then-insert one step.
                session.execute(text("LOCK TABLE audit_events IN SHARE ROW EXCLUSIVE MODE"))
            now = utcnow()
            by_name, by_address = self._counted(session, address, name, now)
            wait = max(self.wait_for(by_name, self.max_failures, now),
                       self.wait_for(by_address, self.max_failures * ADDRESS_FACTOR, now))
            if wait > 0:
                raise RateLimited(int(wait) + 1)
            audit(session, "login.attempt", name=name[:NAME_KEPT], address=address, kind=kind)

    def check(self, session: Session, address: str, name: str) -> None:
        """Raise :class:`RateLimited` when an attempt now would have to wait (reads only).

        Prefer :meth:`reserve`: a check alone can be raced by parallel requests.
        """
        now = utcnow()
        by_name, by_address = self._counted(session, address, name, now)
        wait = max(self.wait_for(by_name, self.max_failures, now),
                   self.wait_for(by_address, self.max_failures * ADDRESS_FACTOR, now))
        if wait > 0:
            raise RateLimited(int(wait) + 1)
