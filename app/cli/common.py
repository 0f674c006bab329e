"""What every sub-command shares: the command record, exit codes, the data-folder flags."""

from __future__ import annotations

import argparse
import dataclasses
import sys
from collections.abc import Callable
from pathlib import Path
from typing import Any

from app.config import Settings
from app.errors import RawproofError

EXIT_OK = 0
EXIT_BAD_INPUT = 2

# How to start this rawproof's command in a child process, whatever PATH says.
RAWPROOF_ARGV = [sys.executable, "-c", "import sys; from app.cli import main; sys.exit(main())"]


@dataclasses.dataclass(frozen=True)
class Command:
    """One ``rawproof`` sub-command.

    Attributes
    ----------
    name : str
    help : str
        One line for ``rawproof --help``.
    add_arguments : callable
        Adds the command's flags to its argparse sub-parser.
    run : callable
        Runs the command with the parsed arguments; returns the exit code.
    """

    name: str
    help: str
    add_arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[Any], int]


def add_common(p: argparse.ArgumentParser, *, nested: bool = False) -> None:
    """The data-folder flags (``--data``, ``--database-url``, ``--max-upload-bytes``)."""
    # nested: repeated on a sub-command (`users add NAME --data DIR`) without
    # overriding a value given before it (`users --data DIR add NAME`)
    extra = {"default": argparse.SUPPRESS} if nested else {}
    p.add_argument("--data", help="data folder (default $RAWPROOF_DATA or ./rawproof-data)",
                   **extra)
    p.add_argument("--database-url", help="SQLAlchemy URL (default SQLite in the data folder)",
                   **extra)
    p.add_argument("--max-upload-bytes", type=int, help="upper bound on one upload", **extra)


def settings_from(args: Any) -> Settings:
    """Settings from the environment, overridden by the common flags."""
    base = Settings()
    changes: dict[str, Any] = {}
    if getattr(args, "data", None):
        changes["data_dir"] = Path(args.data).resolve()
    if getattr(args, "database_url", None):
        changes["database_url"] = args.database_url
    if getattr(args, "max_upload_bytes", None):
        changes["max_upload_bytes"] = int(args.max_upload_bytes)
    return dataclasses.replace(base, **changes)


def common_argv(settings: Settings) -> list[str]:
    """The common flags that give a child ``rawproof`` process the same settings."""
    argv = ["--data", str(settings.data_dir), "--max-upload-bytes",
            str(settings.max_upload_bytes)]
    if settings.database_url:
        argv += ["--database-url", settings.database_url]
    return argv


def migrate(settings: Settings) -> int | None:
    """Bring the database schema up to date; an exit code when that fails, else None."""
    from app.store.migrate import upgrade

    try:
        upgrade(settings)
    except RawproofError as exc:
        print(f"rawproof: {getattr(exc, 'message', exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    return None
