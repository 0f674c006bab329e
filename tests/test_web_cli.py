"""The ``rawproof users`` command as an admin runs it (real subprocesses, real SQLite file)."""

from __future__ import annotations

import dataclasses
import os
import pty
import select
import subprocess

import pytest

from app.config import Settings
from app.store import service
from app.store.db import session_scope
from tests.server_harness import RAWPROOF, REPO


def _at_terminal(argv: list[str], answers: list[tuple[str, str]]) -> tuple[int, str]:
    """Run ``argv`` on a pseudo-terminal, typing each answer after its prompt appears."""
    pid, fd = pty.fork()
    if pid == 0:  # the child: exec the command with the pty as its controlling terminal
        os.chdir(REPO)
        os.execvp(argv[0], argv)
    seen = ""
    try:
        for prompt, answer in answers:
            while prompt not in seen:
                ready, _, _ = select.select([fd], [], [], 60)
                if not ready:
                    raise TimeoutError(f"no {prompt!r} prompt; saw {seen!r}")
                seen += os.read(fd, 1024).decode(errors="replace")
            os.write(fd, (answer + "\n").encode())
            seen = seen.replace(prompt, "", 1)
        while True:
            ready, _, _ = select.select([fd], [], [], 60)
            try:
                chunk = os.read(fd, 1024) if ready else b""
            except OSError:  # the child closed the terminal
                break
            if not chunk:
                break
            seen += chunk.decode(errors="replace")
    finally:
        _, status = os.waitpid(pid, 0)
        os.close(fd)
    return os.waitstatus_to_exitcode(status), seen


def _run(*args: str, stdin: str | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([*RAWPROOF, *args], capture_output=True, text=True, input=stdin,
                          timeout=120, cwd=REPO)


@pytest.mark.slow
def test_users_add_prompts_or_takes_a_flag_and_the_data_flag_goes_anywhere(tmp_path) -> None:
    data = tmp_path / "lab"
    # at a terminal (a pseudo-terminal here) the password is asked twice
    code, said = _at_terminal([*RAWPROOF, "users", "add", "ines", "--data", str(data)],
                              [("Password", "ines-password-1"), ("Again", "ines-password-1")])
    assert code == 0, said
    # without a terminal and without --password: a sentence saying what to do, exit 2
    piped = _run("users", "add", "noor", "--data", str(data), stdin="x\n")
    assert piped.returncode == 2 and "--password" in piped.stderr
    assert "Traceback" not in piped.stderr
    scripted = _run("users", "--data", str(data), "add", "tom", "--admin",
                    "--password", "tom-password-1")
    assert scripted.returncode == 0 and "created admin account tom" in scripted.stdout
    short = _run("users", "add", "kim", "--password", "short", "--data", str(data))
    # NIST SP 800-63B 5.1.1.2: a memorised secret of at least 12 characters here
    assert short.returncode == 2 and "at least 12 characters" in short.stderr
    assert "Traceback" not in short.stderr
    settings = dataclasses.replace(Settings(), data_dir=data, database_url="")
    with session_scope(settings, write=False) as db:
        assert service.authenticate(db, "ines", "ines-password-1") is not None
        tom = service.authenticate(db, "tom", "tom-password-1")
        assert tom is not None and tom.is_admin
        assert service.authenticate(db, "kim", "short") is None
