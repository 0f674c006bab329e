"""The ``backup`` and ``restore`` sub-commands of ``rawproof``.

    rawproof backup DEST [--data DIR] [--database-url URL]
    rawproof restore SRC --data DIR

``backup`` may run while the server and worker run (see :mod:`app.backup`);
``restore`` verifies the manifest and fills a fresh data folder.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from app.cli.common import EXIT_BAD_INPUT, EXIT_OK, Command, settings_from


def _add_backup(p: argparse.ArgumentParser) -> None:
    p.add_argument("dest", help="a new (or empty) folder for the backup")
    p.add_argument("--data", help="data folder (default $RAWPROOF_DATA or ./rawproof-data)")
    p.add_argument("--database-url", help="SQLAlchemy URL (default SQLite in the data folder)")


def _run_backup(args: Any) -> int:
    from app.backup import BackupError, backup

    settings = settings_from(args)
    try:
        summary = backup(settings, Path(args.dest))
    except BackupError as exc:
        print(f"rawproof: backup failed: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    counts = ", ".join(f"{v} {k}" for k, v in summary.counts.items())
    print(f"rawproof: backed up {settings.data_dir} to {summary.folder}: {summary.n_files} "
          f"files, {summary.n_bytes} bytes ({counts}); manifest.json holds their sha256",
          file=sys.stderr)
    return EXIT_OK


def _add_restore(p: argparse.ArgumentParser) -> None:
    p.add_argument("src", help="a folder written by 'rawproof backup'")
    p.add_argument("--data", required=True, help="the new (or empty) data folder to fill")


def _run_restore(args: Any) -> int:
    from app.backup import BackupError, restore

    try:
        summary = restore(Path(args.src), Path(args.data))
    except BackupError as exc:
        print(f"rawproof: restore refused: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    counts = ", ".join(f"{v} {k}" for k, v in summary.counts.items())
    print(f"rawproof: restored {summary.n_files} verified files ({counts}) into "
          f"{summary.folder}; start it with: rawproof serve --data {summary.folder}",
          file=sys.stderr)
    return EXIT_OK


BACKUP = Command("backup", "copy the database and stored files to a folder, with a manifest",
                 _add_backup, _run_backup)
RESTORE = Command("restore", "fill a fresh data folder from a verified backup", _add_restore,
                  _run_restore)
