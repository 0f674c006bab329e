"""Issue 21, Low findings 8-11, 13 and 15, replayed as sent against a real server on 127.0.0.1.

Status codes: RFC 9110 (400 15.5.1, 401 15.5.2, 403 15.5.4, 404 15.5.5, 422
15.5.21, 429 RFC 6585 section 4). Passwords: NIST SP 800-63B section 5.1.1.2
(memorized secret verifiers).
"""

from __future__ import annotations

import re
import sqlite3
import threading
import time

import httpx
import pytest

from tests.server_harness import running_server, zero_filled_npy
from tests.test_hardening_high import PASSWORD

pytestmark = pytest.mark.server

BIG = 2**63  # one past the largest signed 64-bit row id


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("low"), extra_args=["--lease-seconds", "4"],
                        env={"RAWPROOF_LOGIN_DELAY": "5"}) as srv:
        srv.add_users({"ada": PASSWORD, "bea": PASSWORD, "cal": PASSWORD, "dee": PASSWORD,
                       "eve": PASSWORD, "fay": PASSWORD}, admins=("cal",))
        yield srv


@pytest.fixture(scope="module")
def analysed(server) -> int:
    """A dataset uploaded by ada and analysed by the server's worker."""
    ada = server.login("ada", PASSWORD)
    ds = ada.upload_files("low findings", [("scan.npy", zero_filled_npy(21))])["dataset_id"]
    assert ada.wait_for_job(ds)["state"] == "done"
    return ds


def _error(r) -> dict:
    assert r.headers["content-type"].startswith("application/json"), r.text[:200]
    return r.json()["error"]


def test_finding_8_malformed_numbers_answer_422_naming_the_field(server, analysed) -> None:
    """Finding 8: ``expected_current_id`` of "abc", [1] or Infinity, a comment
    ``trace_id`` that is a number or a list, and ids at 2^63 in four routes.

    Each answers 422 (RFC 9110 15.5.21) with the JSON error object naming the
    field, never 500; nothing is stored.
    """
    bea = server.login("bea", PASSWORD)
    h = {"x-csrf-token": bea.csrf(), "content-type": "application/json"}
    for raw in ('"abc"', "[1]", "Infinity", str(BIG)):
        body = '{"outcome": "rejected", "rationale": "r", "expected_current_id": ' + raw + "}"
        r = bea.post(f"/api/datasets/{analysed}/decisions", content=body, headers=h)
        assert r.status_code == 422, (raw, r.status_code, r.text[:200])
        assert "expected_current_id" in _error(r)["message"]
    for raw in ("5", "[1]"):
        r = bea.post(f"/api/datasets/{analysed}/comments", headers=h,
                     content='{"body": "hello", "trace_id": ' + raw + "}")
        assert r.status_code == 422, (raw, r.status_code, r.text[:200])
        assert "trace_id" in _error(r)["message"]
    for path, field in ((f"/datasets/{BIG}", "dataset_id"),
                        (f"/datasets/{BIG}/status", "dataset_id"),
                        (f"/files/{BIG}/download", "link_id"),
                        (f"/api/datasets/{BIG}", "dataset_id")):
        r = bea.get(path, headers={"accept": "application/json"})
        assert r.status_code == 422, (path, r.status_code, r.text[:200])
        err = _error(r)
        assert err["code"] == "invalid_request" and field in err["message"], err
    # the page form: a malformed expected_current_id is refused, not read as "none seen"
    r = bea.post(f"/datasets/{analysed}/decisions",
                 data={"csrf_token": bea.csrf(), "outcome": "rejected", "rationale": "r",
                       "expected_current_id": "abc"})
    assert r.status_code == 422 and "expected_current_id" in r.text
    assert bea.get(f"/api/datasets/{analysed}/decisions").json()["history"] == []
    assert bea.get(f"/api/datasets/{analysed}/comments").json()["comments"] == []


def test_finding_9_report_history_link_downloads_the_report(server, analysed) -> None:
    """Finding 9: every report-history link answered 422. Followed from the page,
    the link now gives the stored report as a JSON attachment."""
    bea = server.login("bea", PASSWORD)
    bea.post_form(f"/datasets/{analysed}/reanalyse", {})
    job = bea.wait_for_job(analysed)
    assert job["state"] == "done"
    page = bea.get(f"/datasets/{analysed}").text
    links = re.findall(rf'href="(/datasets/{analysed}/reports/\d+\.json)"', page)
    assert len(links) == 2, links  # one per report in the history
    for link in links:
        r = bea.get(link)
        assert r.status_code == 200, (link, r.status_code, r.text[:200])
        assert "attachment" in r.headers["content-disposition"]
        assert r.json()["schema"].startswith("rawproof.report/")
    report_id = int(links[0].rsplit("/", 1)[1].split(".")[0])
    assert bea.get(f"/datasets/{analysed}/reports/{report_id}").status_code == 200


def _audit_rows(server, action: str) -> list[tuple]:
    """(id, detail) of the audit events of one action, read from the server's database."""
    con = sqlite3.connect(f"file:{server.data_dir / 'rawproof.sqlite3'}?mode=ro", uri=True)
    try:
        return con.execute("SELECT id, detail FROM audit_events WHERE action = ?",
                           (action,)).fetchall()
    finally:
        con.close()


def _sign_in(c: httpx.Client, name: str, password: str, **headers: str) -> httpx.Response:
    """One sign-in POST with a double-submit CSRF pair chosen by the caller."""
    c.cookies.set("rawproof_login_csrf", "attacker-token")
    return c.post("/login", data={"name": name, "password": password,
                                  "csrf_token": "attacker-token"}, headers=headers)


def test_finding_4_parallel_guesses_cannot_race_the_limit_and_the_user_is_only_delayed(
        server) -> None:
    """Finding 4: 30 parallel wrong passwords got 21 real checks against a limit of 8,
    and the real member was then locked out (429 on the right password).

    Now each check is reserved in one transaction: exactly 8 of the 30 reach the
    password check (401), 22 are refused (429, RFC 6585 section 4) without it; a
    rotated X-Forwarded-For changes nothing; the real member is told to wait
    (Retry-After, here at most the configured 5 s delay) and then signs in with
    the right password: a delay, not a lock-out (NIST SP 800-63B section 5.2.2).
    """
    statuses: list[int] = []
    start = threading.Barrier(30)

    def guess(i: int) -> None:
        with server.client() as c:
            start.wait(30)
            statuses.append(_sign_in(c, "dee", f"guess-number-{i:03d}").status_code)

    threads = [threading.Thread(target=guess, args=(i,)) for i in range(30)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert sorted(statuses).count(401) == 8, sorted(statuses)
    assert sorted(statuses).count(429) == 22, sorted(statuses)
    with server.client() as c:  # a spoofed forwarded address is not believed
        for i in range(5):
            assert _sign_in(c, "dee", "another-guess-1",
                            **{"x-forwarded-for": f"10.0.0.{i}"}).status_code == 429
        r = _sign_in(c, "dee", PASSWORD)  # the real member, from the shared address
        assert r.status_code == 429
        wait = int(r.headers["retry-after"])
        assert 0 < wait <= 6
        deadline = time.monotonic() + wait + 15
        while r.status_code == 429 and time.monotonic() < deadline:
            time.sleep(0.5)  # refused attempts reserve nothing: polling does not extend it
            r = _sign_in(c, "dee", PASSWORD)
        assert r.status_code == 303, r.status_code
    attempts = [row for row in _audit_rows(server, "login.attempt") if '"dee"' in row[1]]
    assert len(attempts) == 9  # 8 guesses and the member's own sign-in


def test_finding_4_current_password_check_is_limited(server) -> None:
    """Finding 4 (also 10): the current-password check on /account/password was not
    limited. Guesses there count against the account's budget: after 8 wrong
    ones the 9th is refused with 429 and no check, even with the right password."""
    eve = server.login("eve", PASSWORD)
    token = eve.csrf()
    codes = [eve.post("/account/password", data={"csrf_token": token, "current": f"nope-{i}",
                                                 "new": "a fresh passphrase for eve"}
                      ).status_code for i in range(9)]
    assert codes == [400] * 8 + [429], codes  # the sign-in's success cleared the count
    r = eve.post("/account/password", data={"csrf_token": token, "current": PASSWORD,
                                            "new": "a fresh passphrase for eve"})
    assert r.status_code == 429 and int(r.headers["retry-after"]) > 0


def test_finding_13_flooded_refusals_are_aggregated_in_the_audit_trail(server) -> None:
    """Finding 13: anonymous sign-ins after the limit wrote one audit row each (10,705
    in 45 s). 300 refused attempts on many names now leave one ``login.limited``
    event per address and minute, whose count covers them all."""
    before = len(_audit_rows(server, "login.limited"))
    with server.client() as c:
        for i in range(8):  # spend fay's budget
            assert _sign_in(c, "fay", f"wrong-{i}").status_code == 401
        codes = [_sign_in(c, "fay", f"flood-{i}").status_code for i in range(300)]
    # a flood slower than the 5 s delay may get one slot per doubling delay: 401, checked
    assert set(codes) <= {401, 429} and codes.count(429) >= 297, codes.count(401)
    rows = _audit_rows(server, "login.limited")
    assert len(rows) - before <= 2  # one per address and minute (a boundary may be crossed)
    assert sum(int(re.search(r'"count": (\d+)', d).group(1)) for _, d in rows) >= 297


def test_finding_10_tokens_cannot_mint_tokens_and_die_with_a_password_reset(server) -> None:
    """Finding 10: an API token could mint new tokens that outlived its revocation, and
    an admin password reset left tokens valid. A token now makes tokens only when it
    was made with that permission (403 otherwise); an admin's reset revokes all of the
    member's tokens (401 afterwards, RFC 9110 15.5.2)."""
    token = server.cli("users", "token", "bea", "--label", "script").stdout.strip()
    api = server.client(headers={"authorization": f"Bearer {token}"})
    assert api.get("/api/me").json()["name"] == "bea"
    r = api.post("/account/tokens", data={"label": "child"})
    assert r.status_code == 403, r.status_code
    bea = server.login("bea", PASSWORD)
    page = bea.post_form("/account/tokens", {"label": "minter", "may_create_tokens": "on"})
    minter = re.search(r"rp_[A-Za-z0-9_-]{20,}", page.text).group(0)
    child_page = server.client(headers={"authorization": f"Bearer {minter}"}).post(
        "/account/tokens", data={"label": "child"})
    assert child_page.status_code == 200
    child = re.search(r"rp_[A-Za-z0-9_-]{20,}", child_page.text).group(0)
    grandchild = server.client(headers={"authorization": f"Bearer {child}"}).post(
        "/account/tokens", data={"label": "grandchild", "may_create_tokens": "on"})
    assert grandchild.status_code == 403  # a child is made without the permission
    cal = server.login("cal", PASSWORD)
    users = cal.get("/admin/users").text
    bea_id = re.search(r"<code>bea</code>.*?/admin/users/(\d+)/password", users, re.S).group(1)
    assert cal.post_form(f"/admin/users/{bea_id}/password",
                         {"password": "bea was reset by cal today"}).status_code in (200, 303)
    for t in (token, minter, child):
        assert server.client(headers={"authorization": f"Bearer {t}"}).get(
            "/api/me").status_code == 401


@pytest.mark.parametrize("password", ["12345678", "password", " " * 8, "\u200b" * 8, "ada",
                                      " " * 14, "\u200b" * 14, "password1234",
                                      "aaaaaaaaaaaa", "ada-ada-ada-ada"])
def test_finding_11_weak_passwords_are_refused(server, password) -> None:
    """Finding 11: ``12345678``, ``password``, eight spaces, eight zero-width spaces
    and the user's own name were accepted. NIST SP 800-63B section 5.1.1.2: at least
    the minimum length after normalisation, not a commonly used or expected value
    (dictionary word, repetition or sequence), not a context-specific word (the user
    name). Refused on the account page (400) and by ``rawproof users add`` (exit 2)."""
    ada = server.login("ada", PASSWORD)
    r = ada.post_form("/account/password", {"current": PASSWORD, "new": password})
    assert r.status_code == 400, r.status_code
    res = server.cli("users", "add", "zed", "--password", password.replace("ada", "zed"),
                     check=False)
    assert res.returncode == 2 and "password" in res.stderr.lower()
    assert "Traceback" not in res.stderr


def test_finding_15_one_letter_folders_and_long_non_ascii_names(server) -> None:
    """Finding 15: ``A/IM1.npy`` beside ``B/IM1.npy`` was refused as a name clash (the
    one-letter folder taken for a drive letter), and a 200-character non-ASCII name
    was accepted, then failed three times with "file name too long" showing the data
    folder's absolute path. POSIX (IEEE Std 1003.1) has no drive letters; NAME_MAX
    (255 bytes on Linux, counted in bytes) bounds one path component."""
    ada = server.login("ada", PASSWORD)
    info = ada.upload_files("two one-letter folders", [("A/IM1.npy", zero_filled_npy(31)),
                                                       ("B/IM1.npy", zero_filled_npy(32))])
    ds = info["dataset_id"]
    names = {f["name"] for f in ada.get(f"/api/datasets/{ds}").json()["files"]}
    assert names == {"A/IM1.npy", "B/IM1.npy"}
    long_a = "é" * 200 + ".npy"  # 404 bytes of UTF-8
    long_b = "é" * 199 + "è.npy"
    info = ada.upload_files("long names", [(long_a, zero_filled_npy(33)),
                                           (long_b, zero_filled_npy(34))])
    ds2 = info["dataset_id"]
    stored = [f["name"] for f in ada.get(f"/api/datasets/{ds2}").json()["files"]]
    assert len(set(stored)) == 2  # shortened with a hash of the whole: still distinct
    assert all(len(n.encode()) <= 255 and n.endswith(".npy") for n in stored), stored
    for d in (ds, ds2):
        job = ada.wait_for_job(d)
        assert job["state"] == "done", job
        assert str(server.data_dir) not in ada.get(f"/datasets/{d}").text


def test_finding_13_effective_rate_chart_cache_is_bounded(server, analysed) -> None:
    """Finding 13: every distinct ``acceleration`` of ``effective-rate.png`` stored a new
    image forever. 120 distinct values now leave at most the cache's bound of charts
    for the report, the newest kept, and each request still answers its PNG."""
    from app.web.evidence import MAX_CHARTS_PER_REPORT

    ada = server.login("ada", PASSWORD)  # bea's password was reset in finding 10
    rep = ada.get(f"/api/datasets/{analysed}").json()["report_id"]
    folder = server.data_dir / "reports" / str(rep) / "figures"
    for i in range(120):
        r = ada.get(f"/datasets/{analysed}/effective-rate.png",
                    params={"acceleration": f"{2 + i / 97:.6f}"})
        assert r.status_code == 200 and r.content.startswith(b"\x89PNG")
    charts = list(folder.glob("effective-*.png"))
    assert 0 < len(charts) <= MAX_CHARTS_PER_REPORT
    newest = float(f"{2 + 119 / 97:.6f}")
    assert any(p.name.endswith(f"-{newest:g}.png") for p in charts)
    print(f"finding 13: {len(charts)} charts, {sum(p.stat().st_size for p in charts)} bytes")
