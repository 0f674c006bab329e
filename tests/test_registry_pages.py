"""The registry lists a large lab page by page, with filters kept across pages.

In-process (Starlette's test client): this checks the page arithmetic and the
query kept in the pager links; the real-server tests cover sign-in and forms.
The page size (100) is the project's own choice, not an outside reference.
"""

from __future__ import annotations

import dataclasses
import re

import pytest
from fastapi.testclient import TestClient

from app.config import Settings
from app.store import migrate, service
from app.store.db import session_scope
from app.web.app import create_app
from app.web.routers.registry import PAGE_SIZE


def _signed_in(client: TestClient) -> None:
    page = client.get("/login")
    token = re.search(r'name="csrf_token" value="([^"]+)"', page.text).group(1)
    r = client.post("/login", data={"name": "ria", "password": "ria-password-1",
                                    "csrf_token": token}, follow_redirects=False)
    assert r.status_code == 303


def test_registry_pages_through_every_dataset_once(tmp_path) -> None:
    settings = dataclasses.replace(Settings(), data_dir=tmp_path / "data", database_url="")
    migrate.upgrade(settings)
    n = PAGE_SIZE + 23
    with session_scope(settings) as db:
        ria = service.create_user(db, "ria", "ria-password-1")
        for i in range(n):
            service.create_dataset(
                db, settings, uploader=ria, name=f"Set {i:03d} {'knee' if i % 2 else 'brain'}",
                source="https://archive.example.org", licence="CC0", description="",
                intended_use="", files=[(f"f{i}.bin", f"content {i}".encode())])
    with TestClient(create_app(settings)) as client:
        _signed_in(client)
        seen = []
        for page in (1, 2):
            html = client.get("/", params={"sort": "name", "order": "asc", "page": page}).text
            seen += re.findall(r'class="ds-name" href="/datasets/\d+">([^<]+)<', html)
        assert seen == [f"Set {i:03d} {'knee' if i % 2 else 'brain'}" for i in range(n)]
        first = client.get("/", params={"sort": "name", "order": "asc"}).text
        assert "page 1 of 2" in first
        assert 'href="/?sort=name&amp;order=asc&amp;page=2"' in first
        # a filter that leaves one page shows no pager; past-the-end pages clamp
        knee = client.get("/", params={"q": "knee", "page": 9}).text
        assert len(re.findall(r'class="ds-name"', knee)) == n // 2
        assert "page 1 of" not in knee


def _members_and_one_dataset(tmp_path) -> tuple[Settings, int]:
    """A migrated data folder with members ria (the uploader) and rev, and one dataset."""
    settings = dataclasses.replace(Settings(), data_dir=tmp_path / "data", database_url="")
    migrate.upgrade(settings)
    with session_scope(settings) as db:
        ria = service.create_user(db, "ria", "ria-password-1")
        service.create_user(db, "rev", "rev-password-1")
        ds = service.create_dataset(db, settings, uploader=ria, name="Set one",
                                    source="https://archive.example.org", licence="CC0",
                                    description="", intended_use="",
                                    files=[("a.bin", b"one")])
        ds_id = ds.id
    return settings, ds_id


def test_registry_shows_every_change_at_once(tmp_path) -> None:
    """The registry's rows are shared between requests until the database changes:
    a decision, a finished job and a new dataset each show on the next page load."""
    settings, ds_id = _members_and_one_dataset(tmp_path)
    with TestClient(create_app(settings)) as client:
        _signed_in(client)
        assert "analysis queued" in client.get("/").text
        with session_scope(settings) as db:
            job = service.latest_job(db, ds_id)
            job.state = "failed"
        assert "analysis failed" in client.get("/").text
        with session_scope(settings) as db:
            service.record_decision(db, dataset=service.get_dataset(db, ds_id),
                                    reviewer=service.get_user(db, "rev"),
                                    outcome="rejected", rationale="no raw data")
        assert "Rejected" in client.get("/").text
        with session_scope(settings) as db:
            service.create_dataset(db, settings, uploader=service.get_user(db, "ria"),
                                   name="Set two", source="https://archive.example.org",
                                   licence="CC0", description="", intended_use="",
                                   files=[("b.bin", b"two")])
        assert "Set two" in client.get("/").text


@pytest.mark.server
def test_serve_with_two_processes_shares_sessions_and_data(tmp_path) -> None:
    """``rawproof serve --processes 2``: both uvicorn processes build the app from the
    same settings, so a member signed in through one is signed in on the other and
    every request sees the same registry (sessions and data live in the database)."""
    from tests.server_harness import running_server, zero_filled_npy

    with running_server(tmp_path / "srv", worker=False,
                        extra_args=["--processes", "2"]) as srv:
        srv.add_user("ria", "ria-password-1")
        ria = srv.login("ria", "ria-password-1")
        info = ria.upload_files("Two-process set", [("scan.npy", zero_filled_npy(5))])
        pages = [ria.get("/") for _ in range(12)]  # spread over both processes
        assert all(p.status_code == 200 for p in pages)
        assert all("Two-process set" in p.text for p in pages)
        assert ria.get(f"/datasets/{info['dataset_id']}").status_code == 200


def test_dataset_page_shows_every_change_at_once(tmp_path) -> None:
    """A dataset page is rendered once per database state and member: a claimed job, a
    worker's progress (heartbeat) and a comment each show on the next load, and each
    member's page carries that member's own CSRF token."""
    from app.store import jobs as jobq
    from app.web import pagecache

    pagecache.clear()
    settings, ds_id = _members_and_one_dataset(tmp_path)
    with TestClient(create_app(settings)) as client, \
            TestClient(create_app(settings)) as other:
        _signed_in(client)
        page = f"/datasets/{ds_id}"
        assert "queued" in client.get(page).text
        with session_scope(settings) as db:
            job = jobq.claim_job(db, "test-worker", lease=60)
            job_id = job.id
        assert "running" in client.get(page).text
        for done in (1, 5):
            with session_scope(settings) as db:
                assert jobq.heartbeat(db, job_id, "test-worker", lease=60, progress={
                    "files": [{"name": "a", "done": done, "total": 9}], "current": "a"})
            assert f"{done} / 9" in client.get(page).text
        with session_scope(settings) as db:
            service.add_comment(db, dataset=service.get_dataset(db, ds_id),
                                author=service.get_user(db, "rev"), body="Looks interpolated")
        assert "Looks interpolated" in client.get(page).text
        token = re.compile(r'name="csrf_token" value="([^"]+)"')
        mine = set(token.findall(client.get(page).text))
        r = other.get("/login")
        t = token.search(r.text).group(1)
        other.post("/login", data={"name": "rev", "password": "rev-password-1",
                                   "csrf_token": t}, follow_redirects=False)
        theirs = set(token.findall(other.get(page).text))
        assert mine and theirs and not (mine & theirs)


def test_kept_pages_stay_within_their_byte_budget() -> None:
    """Least recently used pages go first once MAX_BYTES is reached."""
    from app.web import pagecache

    pagecache.clear()
    page = b"x" * (pagecache.MAX_BYTES // 4 + 1)
    for i in range(10):
        pagecache._keep(("db", f"/datasets/{i}", "", "s", ()), page)
        assert pagecache.kept_bytes() <= pagecache.MAX_BYTES
    assert pagecache.kept_bytes() == 3 * len(page)
    assert list(pagecache._PAGES)[-1][1] == "/datasets/9"
    pagecache.clear()


def test_inconclusive_traces_show_no_call_instead_of_a_probability(tmp_path) -> None:
    """A trace that made no call has no probability of being right: its row says "no
    call" instead of printing a confidence of 0.00, while definite calls keep their
    number (shared/REPORT_CONTRACT.md: confidence is the probability that the status is
    right). Truth built: two 6 x 6 frames of non-negative noise, below the spectral
    analysers' 8-sample minimum (those traces are inconclusive), while magnitude_only
    makes a definite call."""
    import io

    import numpy as np

    from app.worker import run_inline

    settings = dataclasses.replace(Settings(), data_dir=tmp_path / "data", database_url="")
    migrate.upgrade(settings)
    buf = io.BytesIO()
    rng = np.random.default_rng(0)
    np.save(buf, np.abs(rng.normal(size=(2, 6, 6))).astype(np.float32))
    with session_scope(settings) as db:
        ria = service.create_user(db, "ria", "ria-password-1")
        ds = service.create_dataset(db, settings, uploader=ria, name="Tiny", source="x",
                                    licence="CC0", description="", intended_use="",
                                    files=[("tiny.npy", buf.getvalue())])
        ds_id = ds.id
    assert run_inline(settings) == 1
    with TestClient(create_app(settings)) as client:
        _signed_in(client)
        html = client.get(f"/datasets/{ds_id}").text
    rows = re.findall(r'<tr id="trace-(\w+)" class="s-(\w+)">(.*?)</tr>', html, re.S)
    assert rows
    for _, status, body in rows:
        if status == "inconclusive":
            assert "no call" in body
        else:
            assert re.search(r">\d\.\d\d<", body), body[:200]
    assert any(s == "inconclusive" for _, s, _ in rows)
