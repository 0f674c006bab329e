"""The store's plain functions: what the web app, the worker and the demo loader call.

Every function takes an open SQLAlchemy session and leaves committing to the
caller (``with session_scope(settings) as s: ...``), except
:func:`run_pending_jobs`, which manages its own transactions. Every change
writes an audit event in the same transaction.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from datetime import timedelta
from pathlib import Path
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from app.config import Settings
from app.store import files as filestore
from app.store.errors import (
    DecisionConflictError,
    NotFoundError,
    SelfDecisionError,
    ValidationError,
)
from app.store.models import (
    OUTCOMES,
    ApiToken,
    AuditEvent,
    Comment,
    Dataset,
    DatasetFile,
    Decision,
    Job,
    Report,
    StoredFile,
    User,
    WebSession,
    utcnow,
)
from app.store.passwords import hash_password, new_token, token_digest, verify_password

NAME_RE = re.compile(r"[a-z0-9][a-z0-9._-]{1,63}")
MIN_PASSWORD = 8
MAX_COMMENT = 10_000
MAX_FIELD = 5_000


# ---------------------------------------------------------------- audit

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


# ---------------------------------------------------------------- users

def create_user(
    session: Session,
    name: str,
    password: str,
    *,
    admin: bool = False,
    display_name: str | None = None,
    actor: User | None = None,
) -> User:
    """Create an account.

    Parameters
    ----------
    name : str
        Sign-in name: 2-64 characters of lower-case letters, digits, ``.``, ``_``, ``-``.
    password : str
        At least 8 characters; stored as an argon2id hash.

    Raises
    ------
    ValidationError
        For a bad or taken name or a short password.
    """
    name = (name or "").strip()
    if not NAME_RE.fullmatch(name):
        raise ValidationError(
            "A user name is 2-64 characters: lower-case letters, digits, '.', '_' or '-', "
            "starting with a letter or digit."
        )
    if len(password or "") < MIN_PASSWORD:
        raise ValidationError(f"A password needs at least {MIN_PASSWORD} characters.")
    if session.scalar(select(User.id).where(User.name == name)) is not None:
        raise ValidationError(f"There is already an account named {name!r}.")
    user = User(
        name=name,
        display_name=(display_name or "").strip()[:200],
        password_hash=hash_password(password),
        is_admin=bool(admin),
        is_active=True,
    )
    session.add(user)
    session.flush()
    audit(session, "user.create", actor=actor, user=name, admin=bool(admin))
    return user


def get_user(session: Session, name: str) -> User:
    user = session.scalar(select(User).where(User.name == name))
    if user is None:
        raise NotFoundError(f"There is no account named {name!r}.")
    return user


def authenticate(session: Session, name: str, password: str) -> User | None:
    """The active user with this name and password, or None."""
    user = session.scalar(select(User).where(User.name == (name or "").strip()))
    ok = verify_password(user.password_hash if user else None, password or "")
    if not ok or user is None or not user.is_active:
        return None
    return user


def set_password(session: Session, user: User, password: str, *, actor: User | None) -> None:
    if len(password or "") < MIN_PASSWORD:
        raise ValidationError(f"A password needs at least {MIN_PASSWORD} characters.")
    user.password_hash = hash_password(password)
    session.execute(update(WebSession).where(WebSession.user_id == user.id).values(
        expires_at=utcnow()))
    audit(session, "user.password", actor=actor, user=user.name)


def set_active(session: Session, user: User, active: bool, *, actor: User | None) -> None:
    """Enable or disable an account; disabling ends its sessions and revokes its tokens."""
    user.is_active = bool(active)
    if not active:
        session.query(WebSession).filter(WebSession.user_id == user.id).delete()
        session.execute(
            update(ApiToken)
            .where(ApiToken.user_id == user.id, ApiToken.revoked_at.is_(None))
            .values(revoked_at=utcnow())
        )
    audit(session, "user.enable" if active else "user.disable", actor=actor, user=user.name)


def set_admin(session: Session, user: User, admin: bool, *, actor: User | None) -> None:
    user.is_admin = bool(admin)
    audit(session, "user.admin" if admin else "user.unadmin", actor=actor, user=user.name)


# ---------------------------------------------------------------- sessions and tokens

def create_web_session(session: Session, user: User, *, ttl: timedelta) -> tuple[WebSession, str]:
    """A new browser session; returns the row and the cookie value (shown once).

    Expired sessions of every member are deleted on the way.
    """
    session.query(WebSession).filter(WebSession.expires_at <= utcnow()).delete()
    token = new_token()
    row = WebSession(
        id=token_digest(token),
        user_id=user.id,
        csrf_token=new_token(24),
        expires_at=utcnow() + ttl,
    )
    session.add(row)
    session.flush()
    return row, token


def web_session_for(session: Session, token: str | None) -> WebSession | None:
    """The live session for a cookie value, or None."""
    if not token:
        return None
    row = session.get(WebSession, token_digest(token))
    if row is None or row.expires_at <= utcnow() or not row.user.is_active:
        return None
    return row


def end_web_session(session: Session, token: str | None) -> None:
    if token:
        session.query(WebSession).filter(WebSession.id == token_digest(token)).delete()


def create_api_token(session: Session, user: User, label: str = "") -> tuple[ApiToken, str]:
    """A new API token for ``user``; the plain token is returned once and never stored."""
    token = "rp_" + new_token()
    row = ApiToken(user_id=user.id, label=(label or "").strip()[:200],
                   token_hash=token_digest(token), prefix=token[:10])
    session.add(row)
    session.flush()
    audit(session, "token.create", actor=user, token_id=row.id, label=row.label)
    return row, token


def revoke_api_token(session: Session, user: User, token_id: int, *, actor: User) -> ApiToken:
    row = session.get(ApiToken, token_id)
    if row is None or (row.user_id != user.id):
        raise NotFoundError("There is no such API token.")
    if row.revoked_at is None:
        row.revoked_at = utcnow()
        audit(session, "token.revoke", actor=actor, token_id=row.id, user=user.name)
    return row


def user_for_api_token(session: Session, token: str | None) -> User | None:
    """The active user owning an unrevoked token, or None."""
    if not token:
        return None
    row = session.scalar(select(ApiToken).where(ApiToken.token_hash == token_digest(token)))
    if row is None or row.revoked_at is not None or not row.user.is_active:
        return None
    return row.user


# ---------------------------------------------------------------- datasets

FileInput = tuple[str, "Path | bytes | filestore.StoredBlob"]


def _clean(value: str | None, field: str, *, required: bool = False, limit: int = MAX_FIELD
           ) -> str:
    text = (value or "").strip()
    if required and not text:
        raise ValidationError(f"The {field} is required.")
    if len(text) > limit:
        raise ValidationError(f"The {field} is longer than {limit} characters.")
    return text


def _file_row(session: Session, blob: filestore.StoredBlob, name: str) -> StoredFile:
    row = session.scalar(select(StoredFile).where(StoredFile.sha256 == blob.sha256))
    if row is None:
        row = StoredFile(sha256=blob.sha256, size=blob.size, format=filestore.guess_format(name))
        session.add(row)
        session.flush()
    return row


def create_dataset(
    session: Session,
    settings: Settings,
    *,
    uploader: User,
    name: str,
    source: str,
    licence: str,
    description: str,
    intended_use: str,
    files: list[FileInput],
) -> Dataset:
    """Register a candidate dataset, store its files content-addressed and queue its analysis.

    Parameters
    ----------
    files : list of (relative_name, content)
        ``content`` is a Path to copy, bytes, or a blob already in the store
        (:class:`app.store.files.StoredBlob`, as the streaming upload makes).
        Names are sanitised; two files may not end up with the same name.

    Raises
    ------
    ValidationError
        For a missing name or source, no files, or clashing file names.
    """
    ds = Dataset(
        name=_clean(name, "dataset name", required=True, limit=300),
        source=_clean(source, "source (citation or URL)", required=True),
        licence=_clean(licence, "licence", limit=300),
        description=_clean(description, "description"),
        intended_use=_clean(intended_use, "intended use"),
        uploader_id=uploader.id,
    )
    if not files:
        raise ValidationError("A dataset needs at least one file.")
    seen: set[str] = set()
    links = []
    for rel, content in files:
        rel_name = filestore.sanitise_relative_name(rel)
        if rel_name in seen:
            raise ValidationError(f"Two files are both named {rel_name!r}.")
        seen.add(rel_name)
        if isinstance(content, filestore.StoredBlob):
            blob = content
        elif isinstance(content, bytes | bytearray):
            blob = filestore.store_bytes(settings, bytes(content))
        else:
            blob = filestore.store_path(settings, Path(content))
        links.append((rel_name, _file_row(session, blob, rel_name)))
    ds.total_size = sum(f.size for _, f in links)
    session.add(ds)
    session.flush()
    for rel_name, frow in links:
        session.add(DatasetFile(dataset_id=ds.id, file_id=frow.id, relative_name=rel_name))
    session.flush()
    audit(session, "dataset.create", actor=uploader, dataset_id=ds.id, name=ds.name,
          n_files=len(links), size=ds.total_size)
    enqueue_job(session, ds, requested_by=uploader)
    return ds


def get_dataset(session: Session, dataset_id: int) -> Dataset:
    ds = session.get(Dataset, dataset_id)
    if ds is None:
        raise NotFoundError(f"There is no dataset {dataset_id}.")
    return ds


@dataclass
class Duplicate:
    """A file of this dataset whose bytes another dataset already holds."""

    relative_name: str
    other_dataset_id: int
    other_dataset_name: str
    other_relative_name: str


def duplicates_of(session: Session, dataset: Dataset) -> list[Duplicate]:
    """Files of ``dataset`` that are stored once but also belong to other datasets."""
    mine = {df.file_id: df.relative_name for df in dataset.files}
    if not mine:
        return []
    rows = session.execute(
        select(DatasetFile, Dataset)
        .join(Dataset, Dataset.id == DatasetFile.dataset_id)
        .where(DatasetFile.file_id.in_(mine), DatasetFile.dataset_id != dataset.id)
        .order_by(Dataset.id)
    ).all()
    return [Duplicate(mine[df.file_id], ds.id, ds.name, df.relative_name) for df, ds in rows]


# ---------------------------------------------------------------- jobs and reports

def enqueue_job(session: Session, dataset: Dataset, *, requested_by: User | None = None) -> Job:
    """Queue an analysis of ``dataset`` unless one is already queued or running."""
    open_job = session.scalar(
        select(Job).where(Job.dataset_id == dataset.id, Job.state.in_(("queued", "running")))
    )
    if open_job is not None:
        return open_job
    job = Job(dataset_id=dataset.id, state="queued",
              requested_by_id=requested_by.id if requested_by else None)
    session.add(job)
    session.flush()
    audit(session, "job.queue", actor=requested_by, dataset_id=dataset.id, job_id=job.id)
    return job


def request_reanalysis(session: Session, dataset: Dataset, *, user: User) -> Job:
    """Queue a new analysis (one button after a new rawproof); old reports stay in history."""
    job = enqueue_job(session, dataset, requested_by=user)
    audit(session, "dataset.reanalyse", actor=user, dataset_id=dataset.id, job_id=job.id)
    return job


def latest_job(session: Session, dataset_id: int) -> Job | None:
    return session.scalar(select(Job).where(Job.dataset_id == dataset_id).order_by(Job.id.desc()))


def get_current_report(session: Session, dataset_id: int) -> Report | None:
    """The newest stored report row of a dataset (``.data`` is the contract dict), or None."""
    return session.scalar(
        select(Report).where(Report.dataset_id == dataset_id).order_by(Report.id.desc())
    )


def report_history(session: Session, dataset_id: int) -> list[Report]:
    return list(session.scalars(
        select(Report).where(Report.dataset_id == dataset_id).order_by(Report.id.desc())
    ))


def store_report(session: Session, job: Job, report: dict[str, Any]) -> Report:
    """Keep a finished report with the versions that made it (never replaces an old one)."""
    row = Report(
        dataset_id=job.dataset_id,
        job_id=job.id,
        tool_version=str(report.get("tool_version", "")),
        analyser_versions=dict(report.get("analyser_versions") or {}),
        verdict=str(report.get("verdict", "")),
        trace_status={tid: t.get("status") for tid, t in (report.get("traces") or {}).items()},
        body=json.dumps(report),
    )
    session.add(row)
    session.flush()
    return row


def run_pending_jobs(settings: Settings, *, limit: int | None = None) -> int:
    """Process queued analysis jobs synchronously in this process; return how many ran.

    For the demo loader and tests: the same claim/lease/store path as the
    worker, without a process pool.
    """
    from app.worker import run_inline

    return run_inline(settings, limit=limit)


# ---------------------------------------------------------------- comments and decisions

def add_comment(
    session: Session, *, dataset: Dataset, author: User, body: str, trace_id: str | None = None
) -> Comment:
    """Add a plain-text comment, optionally about one trace."""
    text = _clean(body, "comment", required=True, limit=MAX_COMMENT)
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
        raise ValidationError("Choose one of the three outcomes.")
    text = _clean(rationale, "rationale", required=True, limit=MAX_COMMENT)
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
