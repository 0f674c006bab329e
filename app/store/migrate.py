"""Create or upgrade the database schema with Alembic on start.

The Alembic environment lives in ``migrations/`` at the repository root (the
package is installed editable); it is found relative to this file, so the
server starts from any working directory.
"""

from __future__ import annotations

import contextlib
import fcntl
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory

from app.config import Settings
from app.store.db import database
from app.store.errors import SchemaError

MIGRATIONS_DIR = Path(__file__).resolve().parents[2] / "migrations"


def alembic_config(settings: Settings) -> Config:
    """An Alembic :class:`Config` pointing at ``migrations/`` and the settings' database."""
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    cfg.set_main_option("sqlalchemy.url", settings.db_url.replace("%", "%%"))
    return cfg


def current_revision(settings: Settings) -> str | None:
    """The revision the database is at (None for an empty database)."""
    with database(settings).engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def upgrade(settings: Settings) -> str:
    """Bring the database to the newest schema this code knows (``alembic upgrade head``).

    Several processes may start at once (server, workers): a file lock in the
    data folder lets one migrate while the others wait.

    Returns
    -------
    str
        The head revision.

    Raises
    ------
    SchemaError
        When the database was written by a newer rawproof (a revision this
        code does not know).
    """
    cfg = alembic_config(settings)
    script = ScriptDirectory.from_config(cfg)
    head = script.get_current_head()
    settings.data_dir.mkdir(parents=True, exist_ok=True)
    lock_path = settings.data_dir / ".migrate.lock"
    with open(lock_path, "a+") as lock, _locked(lock):
        current = current_revision(settings)
        if current is not None:
            try:
                script.get_revision(current)
            except Exception as exc:  # alembic raises several types for unknown ids
                raise SchemaError(
                    f"The database at {settings.db_url} has schema revision {current!r}, "
                    f"newer than this rawproof {_version()} knows (head {head!r}). "
                    "Upgrade rawproof, or point --database-url at another database."
                ) from exc
        if current != head:
            with database(settings).engine.begin() as conn:
                cfg.attributes["connection"] = conn
                command.upgrade(cfg, "head")
    return str(head)


def _version() -> str:
    import app

    return app.__version__


@contextlib.contextmanager
def _locked(fh):  # noqa: ANN001, ANN202 - a file object
    fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
    try:
        yield
    finally:
        fcntl.flock(fh.fileno(), fcntl.LOCK_UN)
