"""Reviews: comments on a dataset and the lab's decisions (history kept, never overwritten)."""

from __future__ import annotations

import re

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from app.store.audit import audit
from app.store.datasets import clean_field
from app.store.errors import DecisionConflictError, SelfDecisionError, ValidationError
from app.store.models import OUTCOMES, Comment, Dataset, Decision, User, utcnow

MAX_COMMENT = 10_000


def add_comment(
    session: Session, *, dataset: Dataset, author: User, body: str, trace_id: str | None = None
) -> Comment:
    """Add a plain-text comment, optionally about one trace."""
    text = clean_field(body, "comment", required=True, limit=MAX_COMMENT)
    trace = (trace_id or "").strip() or None
    if trace is not None and not re.fullmatch(r"[a-z0-9_]{1,64}", trace):
        raise ValidationError("That trace id is not one rawproof knows.")
    row = Comment(dataset_id=dataset.id, author_id=author.id, body=text, trace_id=trace)
    dataset.updated_at = utcnow()
    session.add(row)
    session.flush()
    audit(session, "comment.add", actor=author, dataset_id=dataset.id, comment_id=row.id,
          trace_id=trace)
    return row


def list_comments(session: Session, dataset_id: int) -> list[Comment]:
    return list(session.scalars(
        select(Comment).where(Comment.dataset_id == dataset_id).order_by(Comment.id)
    ))


def current_decision(session: Session, dataset: Dataset) -> Decision | None:
    if dataset.current_decision_id is None:
        return None
    return session.get(Decision, dataset.current_decision_id)


def list_decisions(session: Session, dataset_id: int) -> list[Decision]:
    """Every decision of a dataset, newest first."""
    return list(session.scalars(
        select(Decision).where(Decision.dataset_id == dataset_id).order_by(Decision.id.desc())
    ))


def record_decision(
    session: Session,
    *,
    dataset: Dataset,
    reviewer: User,
    outcome: str,
    rationale: str,
    expected_current_id: int | None = None,
) -> Decision:
    """Record a new decision; it becomes the current one, the old ones stay in history.

    Parameters
    ----------
    expected_current_id : int, optional
        The id of the decision the reviewer saw (``0`` for "there was none").
        When given, the decision is refused if another one was recorded since.
        ``None`` skips that check (scripts that simply append).

    Raises
    ------
    SelfDecisionError
        The reviewer uploaded the dataset.
    DecisionConflictError
        Another decision was recorded after the one the reviewer saw; its
        ``current`` attribute holds the decision that is now current.
    ValidationError
        Unknown outcome or empty rationale.
    """
    if reviewer.id == dataset.uploader_id:
        raise SelfDecisionError(
            "You uploaded this dataset, so another member must record its decision."
        )
    if outcome not in OUTCOMES:
        raise ValidationError("Choose one of the three outcomes: " + ", ".join(
            f"{key} ({label})" for key, label in OUTCOMES.items()) + ".")
    text = clean_field(rationale, "rationale", required=True, limit=MAX_COMMENT)
    session.refresh(dataset)
    seen = dataset.current_decision_id if expected_current_id is None else (
        expected_current_id or None)
    if seen != dataset.current_decision_id:
        raise DecisionConflictError(_conflict_message(session, dataset),
                                    current_decision(session, dataset))
    try:
        with session.begin_nested():
            row = Decision(dataset_id=dataset.id, reviewer_id=reviewer.id, outcome=outcome,
                           rationale=text, previous_id=seen)
            session.add(row)
            session.flush()
            cond = (Dataset.current_decision_id.is_(None) if seen is None
                    else Dataset.current_decision_id == seen)
            swapped = session.execute(
                update(Dataset).where(Dataset.id == dataset.id, cond)
                .values(current_decision_id=row.id, updated_at=utcnow())
                .execution_options(synchronize_session=False)
            ).rowcount
            if swapped != 1:
                raise _LostRaceError()
    except _LostRaceError:
        session.refresh(dataset)
        raise DecisionConflictError(_conflict_message(session, dataset),
                                    current_decision(session, dataset)) from None
    session.refresh(dataset)
    audit(session, "decision.record", actor=reviewer, dataset_id=dataset.id, decision_id=row.id,
          outcome=outcome, previous_id=seen)
    return row


class _LostRaceError(Exception):
    """The compare-and-swap lost a race (rolled back with the savepoint)."""


def _conflict_message(session: Session, dataset: Dataset) -> str:
    cur = current_decision(session, dataset)
    if cur is None:
        return "The decision changed while you were reviewing; reload and decide again."
    return (
        f"{cur.reviewer.label} recorded \u201c{cur.outcome_label}\u201d at "
        f"{cur.created_at:%Y-%m-%d %H:%M} UTC while you were reviewing. Read it, then "
        "decide again if you still disagree."
    )
