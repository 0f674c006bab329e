"""Start a real ``rawproof serve`` process on 127.0.0.1 for tests, and sign members in.

The server runs as a subprocess on a free port with a temporary data folder
(SQLite file inside it), exactly as a lab member starts it; readiness is
waited for by polling ``/healthz``; accounts are made with the real
``rawproof users add`` command. Teardown stops the whole process group
(server, its worker and the worker's pool).

Use it from a module-scoped fixture so that one server serves a whole test
module::

    import pytest
    from tests.server_harness import running_server

    @pytest.fixture(scope="module")
    def server(tmp_path_factory):
        with running_server(tmp_path_factory.mktemp("srv")) as srv:  # worker=False: none
            srv.add_users({"ada": "ada-password-1", "ben": "ben-password-1"},
                          admins=("ada",))
            yield srv

    def test_something(server):
        ada = server.login("ada", "ada-password-1")          # a signed-in httpx.Client
        info = ada.upload_files("Set A", [("scan.npy", npy_bytes)])   # dict from /upload
        job = ada.wait_for_job(info["dataset_id"])            # waits for done/failed
        page = ada.get(f"/datasets/{info['dataset_id']}")
        ada.post_form(f"/datasets/{info['dataset_id']}/comments", {"body": "hi"})

For a browser test, ``server.base_url`` is the address to open and
``server.add_user`` makes the accounts the browser signs in with.
``running_server(..., extra_args=["--max-upload-bytes", "100000"], env={...})``
passes flags and environment to ``rawproof serve``; ``server.cli(...)`` runs
any other ``rawproof`` command against the same data folder.
"""

from __future__ import annotations

import contextlib
import os
import re
import signal
import socket
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx

from app.cli import RAWPROOF_ARGV as RAWPROOF

REPO = Path(__file__).resolve().parents[1]
_CSRF_RE = re.compile(r'name="csrf_token" value="([^"]+)"')


def free_port() -> int:
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Member(httpx.Client):
    """An httpx client signed in as one member, with CSRF-aware helpers."""

    def csrf(self, page: str = "/account") -> str:
        """The CSRF token from a page's forms (the session's token)."""
        r = self.get(page)
        m = _CSRF_RE.search(r.text)
        if m is None:
            raise AssertionError(f"no CSRF token on {page} (HTTP {r.status_code})")
        return m.group(1)

    def post_form(self, path: str, data: dict[str, Any], *, page: str = "/account"
                  ) -> httpx.Response:
        """POST a form with the session's CSRF token added."""
        return self.post(path, data={**data, "csrf_token": self.csrf(page)})

    def upload_files(self, name: str, files: list[tuple[str, bytes]], *,
                     source: str = "https://data.example.org/set",
                     licence: str = "CC BY 4.0", description: str = "",
                     intended_use: str = "testing", expect: int = 201) -> dict[str, Any]:
        """Register a dataset through ``POST /upload`` and return its JSON answer."""
        fields = {"csrf_token": self.csrf("/upload"), "name": name, "source": source,
                  "licence": licence, "description": description,
                  "intended_use": intended_use}
        parts = [("files", (fname, content, "application/octet-stream"))
                 for fname, content in files]
        data = dict(fields)
        data["relpath"] = [fname for fname, _ in files]
        r = self.post("/upload", data=data, files=parts, headers={"accept": "application/json"})
        assert r.status_code == expect, (r.status_code, r.text[:500])
        return r.json()

    def wait_for_job(self, dataset_id: int, *, timeout: float = 120.0,
                     states: tuple[str, ...] = ("done", "failed")) -> dict[str, Any]:
        """Poll the dataset's status until its latest job is in one of ``states``."""
        deadline = time.monotonic() + timeout
        while True:
            job = self.get(f"/datasets/{dataset_id}/status").json()["job"]
            if job and job["state"] in states:
                return job
            if time.monotonic() > deadline:
                raise AssertionError(f"job of dataset {dataset_id} still {job} after {timeout}s")
            time.sleep(0.2)


class Server:
    """A running ``rawproof serve`` (see the module docstring)."""

    def __init__(self, data_dir: Path, port: int, proc: subprocess.Popen, log: Path,
                 env: dict[str, str]) -> None:
        self.data_dir = data_dir
        self.port = port
        self.proc = proc
        self.log = log
        self.env = env
        self.base_url = f"http://127.0.0.1:{port}"

    def cli(self, *args: str, check: bool = True, input: str | None = None  # noqa: A002
            ) -> subprocess.CompletedProcess:
        """Run ``rawproof ARGS --data <this server's data folder>``."""
        cmd = [*RAWPROOF, *args[:1], "--data", str(self.data_dir), *args[1:]]
        res = subprocess.run(cmd, capture_output=True, text=True, env=self.env, input=input,
                             timeout=120, cwd=REPO)
        if check and res.returncode != 0:
            raise AssertionError(f"{args} failed ({res.returncode}): {res.stderr}")
        return res

    def add_user(self, name: str, password: str, *, admin: bool = False) -> None:
        self.cli("users", "add", name, "--password", password, *(["--admin"] if admin else []))

    def add_users(self, passwords: dict[str, str], *, admins: tuple[str, ...] = ()) -> None:
        """Several ``rawproof users add`` commands at once (they wait on SQLite's lock)."""
        procs = []
        for name, password in passwords.items():
            cmd = [*RAWPROOF, "users", "--data", str(self.data_dir), "add", name,
                   "--password", password, *(["--admin"] if name in admins else [])]
            procs.append((name, subprocess.Popen(cmd, stdout=subprocess.PIPE,
                                                 stderr=subprocess.PIPE, text=True,
                                                 env=self.env, cwd=REPO)))
        for name, proc in procs:
            _out, err = proc.communicate(timeout=120)
            if proc.returncode != 0:
                raise AssertionError(f"users add {name} failed ({proc.returncode}): {err}")

    def client(self, **kwargs: Any) -> Member:
        """A client that is not signed in."""
        return Member(base_url=self.base_url, timeout=60.0, **kwargs)

    def login(self, name: str, password: str) -> Member:
        """A client signed in through the real sign-in form."""
        c = self.client()
        page = c.get("/login")
        token = _CSRF_RE.search(page.text).group(1)
        r = c.post("/login", data={"name": name, "password": password, "csrf_token": token,
                                   "next": "/"})
        if r.status_code != 303:
            raise AssertionError(f"sign-in of {name} failed: HTTP {r.status_code}")
        return c

    def stop(self) -> None:
        if self.proc.poll() is None:
            with contextlib.suppress(ProcessLookupError):
                os.killpg(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(timeout=15)
            except subprocess.TimeoutExpired:
                pass
        with contextlib.suppress(ProcessLookupError):
            os.killpg(self.proc.pid, signal.SIGKILL)
        with contextlib.suppress(subprocess.TimeoutExpired):
            self.proc.wait(timeout=5)


def start_server(data_dir: Path, *, worker: bool = True, extra_args: list[str] | None = None,
                 env: dict[str, str] | None = None, timeout: float = 60.0) -> Server:
    """Start ``rawproof serve`` and wait until it answers; see :func:`running_server`."""
    data_dir = Path(data_dir)
    data_dir.mkdir(parents=True, exist_ok=True)
    port = free_port()
    full_env = {**os.environ, **(env or {})}
    full_env.pop("RAWPROOF_DATABASE_URL", None)
    log = data_dir / "server.log"
    args = [*RAWPROOF, "serve", "--data", str(data_dir), "--host", "127.0.0.1",
            "--port", str(port), *([] if worker else ["--no-worker"]), *(extra_args or [])]
    with open(log, "ab") as fh:
        proc = subprocess.Popen(args, stdout=fh, stderr=subprocess.STDOUT, env=full_env,
                                start_new_session=True, cwd=REPO)
    srv = Server(data_dir, port, proc, log, full_env)
    deadline = time.monotonic() + timeout
    while True:
        if proc.poll() is not None:
            raise RuntimeError(f"rawproof serve exited ({proc.returncode}):\n{log.read_text()}")
        try:
            if httpx.get(f"{srv.base_url}/healthz", timeout=2.0).status_code == 200:
                return srv
        except httpx.HTTPError:
            pass
        if time.monotonic() > deadline:
            srv.stop()
            raise RuntimeError(f"rawproof serve did not answer in {timeout}s:\n{log.read_text()}")
        time.sleep(0.1)


@contextlib.contextmanager
def running_server(data_dir: Path, **kwargs: Any) -> Iterator[Server]:
    """``with running_server(tmp) as srv:`` a started server, stopped at the end."""
    srv = start_server(data_dir, **kwargs)
    try:
        yield srv
    finally:
        srv.stop()


class InProcessServer:
    """The web app in this process, reached through FastAPI's ``TestClient``.

    The same surface as :class:`Server` for route tests that need neither a real
    socket nor a worker (``add_user(s)``, ``client``, ``login``, ``data_dir``):
    accounts are made through the store's service layer instead of the command.
    """

    base_url = "http://testserver"

    def __init__(self, data_dir: Path) -> None:
        import dataclasses

        from app.config import Settings
        from app.store import migrate
        from app.web.app import create_app

        self.data_dir = data_dir
        self.settings = dataclasses.replace(Settings(), data_dir=data_dir, database_url="")
        migrate.upgrade(self.settings)
        self.app = create_app(self.settings)

    def add_user(self, name: str, password: str, *, admin: bool = False) -> None:
        from app.store import service
        from app.store.db import session_scope

        with session_scope(self.settings) as db:
            service.create_user(db, name, password, admin=admin)

    def add_users(self, passwords: dict[str, str], *, admins: tuple[str, ...] = ()) -> None:
        for name, password in passwords.items():
            self.add_user(name, password, admin=name in admins)

    def client(self, **kwargs: Any) -> Member:
        """A client that is not signed in."""
        from fastapi.testclient import TestClient

        class _InProcessMember(Member, TestClient):
            pass

        return _InProcessMember(self.app, base_url=self.base_url, follow_redirects=False,
                                **kwargs)

    login = Server.login


@contextlib.contextmanager
def inprocess_server(data_dir: Path) -> Iterator[InProcessServer]:
    """An :class:`InProcessServer` on a fresh data folder."""
    srv = InProcessServer(data_dir)
    try:
        yield srv
    finally:
        from app.store.db import database

        database(srv.settings).engine.dispose()


def start_worker(data_dir: Path, *args: str, env: dict[str, str] | None = None,
                 log_name: str = "worker.log") -> subprocess.Popen:
    """Start a separate ``rawproof worker`` on the data folder (in its own process group)."""
    full_env = {**os.environ, **(env or {})}
    with open(Path(data_dir) / log_name, "ab") as fh:
        return subprocess.Popen([*RAWPROOF, "worker", "--data", str(data_dir), *args],
                                stdout=fh, stderr=subprocess.STDOUT, env=full_env,
                                start_new_session=True, cwd=REPO)


def stop_process_group(proc: subprocess.Popen, sig: int = signal.SIGTERM) -> None:
    """Signal a process started with ``start_new_session`` and all its children."""
    with contextlib.suppress(ProcessLookupError):
        os.killpg(proc.pid, sig)
    try:
        proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=5)


def zero_filled_npy(seed: int = 3) -> bytes:
    """A small candidate file with a known truth, as ``.npy`` bytes.

    Truth (built by ``demo_data.synth.zero_filled_magnitude``): 4 receive
    coils at 32 x 32, k-space zero-filled 2x to 64 x 64, combined by
    root-sum-of-squares, 2 slices, scaled to uint16. Different seeds give
    different bytes (so uploads are not duplicates unless meant to be).
    """
    import io

    import numpy as np

    from demo_data import synth

    mag, _ = synth.zero_filled_magnitude((32, 32), (2.0, 2.0), n_coils=4, n_slices=2, seed=seed)
    buf = io.BytesIO()
    np.save(buf, np.round(mag / mag.max() * 4000).astype(np.uint16))
    return buf.getvalue()
