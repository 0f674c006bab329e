"""The audit trail: one event per change, written in the change's own transaction.

The page cache's change key and the sign-in limit both count these events
(:mod:`app.store.registry`, :mod:`app.web.ratelimit`).
"""

from __future__ import annotations

from typing import Any

from sqlalchemy.orm import Session

from app.store.models import AuditEvent, User

__all__ = ["audit"]


def audit(
    session: Session,
    action: str,
    *,
    actor: User | None = None,
    dataset_id: int | None = None,
    **detail: Any,
) -> AuditEvent:
    """Record one audit event (who did what to which dataset)."""
    ev = AuditEvent(
        action=action,
        actor_id=actor.id if actor is not None else None,
        dataset_id=dataset_id,
        detail=detail or None,
    )
    session.add(ev)
    return ev
