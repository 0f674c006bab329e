"""Engine and sessions.

SQLite (the embedded default) runs in WAL mode with a busy timeout and foreign
keys on. Sessions opened with ``write=True`` start their transaction with
``BEGIN IMMEDIATE`` so that a read-check-write sequence (claiming a job,
recording a decision) holds the write lock from its first read and never fails
half-way with a stale snapshot; read sessions use a plain ``BEGIN``.
"""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from functools import lru_cache

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.orm import Session, sessionmaker

from app.config import Settings

BUSY_TIMEOUT_MS = 30_000
_IMMEDIATE = "rawproof_immediate"


def is_sqlite(url: str) -> bool:
    return url.startswith("sqlite")


def make_engine(url: str) -> Engine:
    """Create an engine for ``url`` with rawproof's SQLite pragmas."""
    if not is_sqlite(url):
        return create_engine(url, pool_pre_ping=True)
    engine = create_engine(
        url, connect_args={"check_same_thread": False, "timeout": BUSY_TIMEOUT_MS / 1000}
    )

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_conn, _record) -> None:  # noqa: ANN001 - DB-API objects
        # Let SQLAlchemy's "begin" event below emit BEGIN itself.
        dbapi_conn.isolation_level = None
        cur = dbapi_conn.cursor()
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute(f"PRAGMA busy_timeout={BUSY_TIMEOUT_MS}")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute("PRAGMA synchronous=NORMAL")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn) -> None:  # noqa: ANN001
        immediate = conn.get_execution_options().get(_IMMEDIATE, False)
        conn.exec_driver_sql("BEGIN IMMEDIATE" if immediate else "BEGIN")

    return engine


class Database:
    """An engine with a read and a write session factory."""

    def __init__(self, url: str) -> None:
        self.url = url
        self.engine = make_engine(url)
        self._read = sessionmaker(self.engine, expire_on_commit=False)
        writer = self.engine.execution_options(**{_IMMEDIATE: True})
        self._write = sessionmaker(writer, expire_on_commit=False)

    def session(self, *, write: bool = False) -> Session:
        """A new session; ``write=True`` takes the write lock at its first statement."""
        return (self._write if write else self._read)()

    @contextlib.contextmanager
    def scope(self, *, write: bool = True) -> Iterator[Session]:
        """A session that commits on success and rolls back on error."""
        session = self.session(write=write)
        try:
            yield session
            session.commit()
        except BaseException:
            session.rollback()
            raise
        finally:
            session.close()


@lru_cache(maxsize=8)
def _database(url: str) -> Database:
    return Database(url)


def database(settings: Settings) -> Database:
    """The process-wide :class:`Database` for these settings (one engine per URL)."""
    settings.data_dir.mkdir(parents=True, exist_ok=True)
    return _database(settings.db_url)


def session_scope(
    settings: Settings, *, write: bool = True
) -> contextlib.AbstractContextManager[Session]:
    """Shortcut: ``with session_scope(settings) as s: ...`` commits at the end."""
    return database(settings).scope(write=write)
