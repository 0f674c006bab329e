"""The ``rawproof users`` command as an admin runs it (real subprocesses, real SQLite file)."""

from __future__ import annotations

import dataclasses
import subprocess

from app.config import Settings
from app.store import service
from app.store.db import session_scope
from tests.server_harness import RAWPROOF, REPO


def _run(*args: str, stdin: str | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([*RAWPROOF, *args], capture_output=True, text=True, input=stdin,
                          timeout=120, cwd=REPO)


def test_users_add_prompts_or_takes_a_flag_and_the_data_flag_goes_anywhere(tmp_path) -> None:
    data = tmp_path / "lab"
    prompted = _run("users", "add", "ines", "--data", str(data),
                    stdin="ines-password-1\nines-password-1\n")
    assert prompted.returncode == 0, prompted.stderr
    scripted = _run("users", "--data", str(data), "add", "tom", "--admin",
                    "--password", "tom-password-1")
    assert scripted.returncode == 0 and "created admin account tom" in scripted.stdout
    short = _run("users", "add", "kim", "--password", "short", "--data", str(data))
    assert short.returncode == 2 and "at least 8 characters" in short.stderr
    assert "Traceback" not in short.stderr
    settings = dataclasses.replace(Settings(), data_dir=data, database_url="")
    with session_scope(settings, write=False) as db:
        assert service.authenticate(db, "ines", "ines-password-1") is not None
        tom = service.authenticate(db, "tom", "tom-password-1")
        assert tom is not None and tom.is_admin
        assert service.authenticate(db, "kim", "short") is None
