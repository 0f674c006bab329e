"""The audit trail: one event per change, written in the change's own transaction.

The page cache's change key and the sign-in limit both count these events
(:mod:`app.store.registry`, :mod:`app.web.ratelimit`).

Refusals that an anonymous flood can repeat without limit (a sign-in refused by
the rate limit) are aggregated: one event per address and minute, whose
``count`` grows, instead of one row per request (issue 21, finding 13).
"""

from __future__ import annotations

from datetime import timedelta
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store.models import AuditEvent, User, utcnow

__all__ = ["AGGREGATED", "AGGREGATE_SECONDS", "audit"]

#: actions recorded as one event per address per :data:`AGGREGATE_SECONDS`
AGGREGATED = frozenset({"login.limited", "password.limited"})
AGGREGATE_SECONDS = 60
#: distinct names an aggregated event lists (the count covers the rest)
NAMES_KEPT = 10


def audit(
    session: Session,
    action: str,
    *,
    actor: User | None = None,
    dataset_id: int | None = None,
    **detail: Any,
) -> AuditEvent:
    """Record one audit event (who did what to which dataset)."""
    if action in AGGREGATED and actor is None and dataset_id is None:
        return _aggregate(session, action, detail)
    ev = AuditEvent(
        action=action,
        actor_id=actor.id if actor is not None else None,
        dataset_id=dataset_id,
        detail=detail or None,
    )
    session.add(ev)
    return ev


def _aggregate(session: Session, action: str, detail: dict[str, Any]) -> AuditEvent:
    """Count one more ``action`` from ``detail["address"]`` on this minute's event."""
    now = utcnow()
    address = detail.get("address")
    name = str(detail.get("name") or "")
    recent = session.scalars(
        select(AuditEvent)
        .where(AuditEvent.action == action,
               AuditEvent.at >= now - timedelta(seconds=AGGREGATE_SECONDS))
        .order_by(AuditEvent.id.desc()).limit(20)
    ).all()
    for ev in recent:
        d = ev.detail or {}
        if d.get("address") == address:
            names = list(d.get("names") or [])
            if name and name not in names and len(names) < NAMES_KEPT:
                names.append(name)
            # a new dict, so that the JSON column is seen as changed
            ev.detail = {**d, "names": names, "count": int(d.get("count") or 1) + 1,
                         "last_at": now.isoformat() + "Z"}
            return ev
    ev = AuditEvent(action=action, actor_id=None, dataset_id=None,
                    detail={"address": address, "names": [name] if name else [], "count": 1,
                            "last_at": now.isoformat() + "Z"})
    session.add(ev)
    return ev
