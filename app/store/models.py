"""The database tables (SQLAlchemy 2 declarative models).

Times are naive UTC ``datetime`` values (SQLite keeps no time zone). Schema
changes go through Alembic migrations in ``migrations/versions``; a change
here without a migration is a bug that ``tests/test_store_schema.py`` catches.
"""

from __future__ import annotations

import json
from datetime import datetime, timezone
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

from app.methods import OUTCOME_LABELS

#: The three outcomes (one source: :data:`app.methods.OUTCOME_LABELS`).
OUTCOMES: dict[str, str] = OUTCOME_LABELS

JOB_STATES = ("queued", "running", "done", "failed")


def utcnow() -> datetime:
    """Now, as naive UTC."""
    return datetime.now(timezone.utc).replace(tzinfo=None)


class Base(DeclarativeBase):
    """Declarative base of every rawproof table."""


class User(Base):
    __tablename__ = "users"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    display_name: Mapped[str] = mapped_column(String(200), default="")
    password_hash: Mapped[str] = mapped_column(String(255))
    is_admin: Mapped[bool] = mapped_column(Boolean, default=False)
    is_active: Mapped[bool] = mapped_column(Boolean, default=True)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)

    @property
    def label(self) -> str:
        return self.display_name or self.name


class WebSession(Base):
    """A signed-in browser; the cookie holds a random token, the row its sha256."""

    __tablename__ = "sessions"

    id: Mapped[str] = mapped_column(String(64), primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id", ondelete="CASCADE"), index=True)
    csrf_token: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    expires_at: Mapped[datetime] = mapped_column(DateTime)
    last_seen_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)

    user: Mapped[User] = relationship()


class ApiToken(Base):
    """A per-user bearer token for scripts; only its sha256 is kept."""

    __tablename__ = "api_tokens"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    user_id: Mapped[int] = mapped_column(ForeignKey("users.id", ondelete="CASCADE"), index=True)
    label: Mapped[str] = mapped_column(String(200), default="")
    token_hash: Mapped[str] = mapped_column(String(64), unique=True)
    prefix: Mapped[str] = mapped_column(String(16))
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    last_used_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)
    revoked_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)
    #: whether a request signed in with this token may make new tokens (migration 0003)
    may_create_tokens: Mapped[bool] = mapped_column(Boolean, default=False)

    user: Mapped[User] = relationship()


class StoredFile(Base):
    """One distinct file content, kept once under ``store/ab/<sha256>``."""

    __tablename__ = "files"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    sha256: Mapped[str] = mapped_column(String(64), unique=True)
    size: Mapped[int] = mapped_column(BigInteger)
    format: Mapped[str] = mapped_column(String(32), default="")
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)


class Dataset(Base):
    __tablename__ = "datasets"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(300))
    source: Mapped[str] = mapped_column(Text, default="")
    licence: Mapped[str] = mapped_column(String(300), default="")
    description: Mapped[str] = mapped_column(Text, default="")
    intended_use: Mapped[str] = mapped_column(Text, default="")
    uploader_id: Mapped[int] = mapped_column(ForeignKey("users.id"), index=True)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    updated_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    total_size: Mapped[int] = mapped_column(BigInteger, default=0)
    # The id of the latest decision; updated by compare-and-swap so that two
    # reviewers deciding at once cannot silently overwrite each other.
    current_decision_id: Mapped[int | None] = mapped_column(Integer, nullable=True)
    # Withdrawn datasets leave the default registry view and stay for the record;
    # their files stay until an admin purges them (files_purged_at set).
    withdrawn_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)
    withdrawn_reason: Mapped[str] = mapped_column(Text, default="")
    files_purged_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)

    uploader: Mapped[User] = relationship()
    files: Mapped[list[DatasetFile]] = relationship(
        back_populates="dataset", order_by="DatasetFile.relative_name"
    )


class DatasetFile(Base):
    """A dataset's file under its (sanitised) original relative name."""

    __tablename__ = "dataset_files"
    __table_args__ = (UniqueConstraint("dataset_id", "relative_name"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    dataset_id: Mapped[int] = mapped_column(
        ForeignKey("datasets.id", ondelete="CASCADE"), index=True
    )
    file_id: Mapped[int] = mapped_column(ForeignKey("files.id"), index=True)
    relative_name: Mapped[str] = mapped_column(String(1000))

    dataset: Mapped[Dataset] = relationship(back_populates="files")
    file: Mapped[StoredFile] = relationship()


class Job(Base):
    """One analysis of one dataset: queued -> running -> done | failed."""

    __tablename__ = "jobs"
    __table_args__ = (Index("ix_jobs_state_lease", "state", "lease_expires_at"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    dataset_id: Mapped[int] = mapped_column(
        ForeignKey("datasets.id", ondelete="CASCADE"), index=True
    )
    state: Mapped[str] = mapped_column(String(16), default="queued")
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    lease_owner: Mapped[str | None] = mapped_column(String(200), nullable=True)
    lease_expires_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)
    heartbeat_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)
    error: Mapped[str | None] = mapped_column(Text, nullable=True)
    progress: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)
    requested_by_id: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)
    report_id: Mapped[int | None] = mapped_column(Integer, nullable=True)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    started_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)
    finished_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)


class Report(Base):
    """A stored report contract object with the versions that produced it."""

    __tablename__ = "reports"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    dataset_id: Mapped[int] = mapped_column(
        ForeignKey("datasets.id", ondelete="CASCADE"), index=True
    )
    job_id: Mapped[int | None] = mapped_column(ForeignKey("jobs.id"), nullable=True)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    tool_version: Mapped[str] = mapped_column(String(32))
    analyser_versions: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    verdict: Mapped[str] = mapped_column(String(32))
    trace_status: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    body: Mapped[str] = mapped_column(Text)

    @property
    def data(self) -> dict[str, Any]:
        """The report contract object."""
        return json.loads(self.body)


class Comment(Base):
    __tablename__ = "comments"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    dataset_id: Mapped[int] = mapped_column(
        ForeignKey("datasets.id", ondelete="CASCADE"), index=True
    )
    author_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    body: Mapped[str] = mapped_column(Text)
    trace_id: Mapped[str | None] = mapped_column(String(64), nullable=True)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)

    author: Mapped[User] = relationship()


class Decision(Base):
    """One recorded decision; never updated, the latest is the current one."""

    __tablename__ = "decisions"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    dataset_id: Mapped[int] = mapped_column(
        ForeignKey("datasets.id", ondelete="CASCADE"), index=True
    )
    reviewer_id: Mapped[int] = mapped_column(ForeignKey("users.id"))
    outcome: Mapped[str] = mapped_column(String(32))
    rationale: Mapped[str] = mapped_column(Text)
    previous_id: Mapped[int | None] = mapped_column(Integer, nullable=True)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)

    reviewer: Mapped[User] = relationship()

    @property
    def outcome_label(self) -> str:
        return OUTCOMES.get(self.outcome, self.outcome)


class AuditEvent(Base):
    """Who changed what, when."""

    __tablename__ = "audit_events"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    at: Mapped[datetime] = mapped_column(DateTime, default=utcnow, index=True)
    actor_id: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)
    action: Mapped[str] = mapped_column(String(64))
    dataset_id: Mapped[int | None] = mapped_column(Integer, nullable=True, index=True)
    detail: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)

    actor: Mapped[User | None] = relationship()


class ProbeRun(Base):
    """One run of the bias probe (:mod:`app.probe`) on a dataset's current report.

    queued -> running -> done | failed, run by the worker (:mod:`app.probe_jobs`);
    ``result`` holds the ``rawproof.probe/1`` object, ``gap`` its NRMSE gap (for
    sorting the registry).
    """

    __tablename__ = "probe_runs"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    dataset_id: Mapped[int] = mapped_column(
        ForeignKey("datasets.id", ondelete="CASCADE"), index=True
    )
    report_id: Mapped[int | None] = mapped_column(Integer, nullable=True)
    requested_by_id: Mapped[int | None] = mapped_column(ForeignKey("users.id"), nullable=True)
    state: Mapped[str] = mapped_column(String(16), default="queued", index=True)
    acceleration: Mapped[float] = mapped_column(Float, default=4.0)
    family: Mapped[str] = mapped_column(String(32), default="polynomial")
    slices: Mapped[int] = mapped_column(Integer, default=8)
    progress: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)
    result: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)
    gap: Mapped[float | None] = mapped_column(Float, nullable=True)
    error: Mapped[str | None] = mapped_column(Text, nullable=True)
    lease_owner: Mapped[str | None] = mapped_column(String(200), nullable=True)
    lease_expires_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)
    updated_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    created_at: Mapped[datetime] = mapped_column(DateTime, default=utcnow)
    finished_at: Mapped[datetime | None] = mapped_column(DateTime, nullable=True)

    requested_by: Mapped[User | None] = relationship()
