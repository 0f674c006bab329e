"""Security checks that tests/test_web_auth.py does not already make, against real servers.

test_web_auth.py walks the route table (authentication), posts every form without
its CSRF token, checks cookie flags over HTTP, session rotation, the sign-in rate
limit, the security headers and API token revocation from the account page. Here:

- cookies carry ``Secure`` when the server is told it is served over HTTPS
  (``RAWPROOF_SECURE_COOKIES=1``; RFC 6265 4.1.2.5), both the session cookie and
  the sign-in form's CSRF cookie, besides HttpOnly and SameSite;
- script payloads (OWASP XSS filter-evasion examples, recalled from memory) in every
  dataset field, file name, comment, trace anchor and token label come back
  HTML-escaped on every page that shows them (the browser check is
  tests/test_security_browser.py);
- downloads are ``application/octet-stream`` attachments with ``nosniff``, whatever
  the uploaded name and bytes say (an ``.html`` or ``.svg`` file with a script), and
  a name carrying CR/LF cannot add a response header (RFC 9110 5.5);
- a file name that names a served path (``../../static/evil.js``, ``static/app.js``)
  never puts bytes there: files live in the store by sha256 only;
- ``rawproof users token NAME --revoke ID`` ends a token at once.
"""

from __future__ import annotations

import hashlib
import html
import re
from pathlib import Path

import pytest

from tests.server_harness import REPO, running_server, zero_filled_npy

pytestmark = pytest.mark.server

PW = {"ada": "ada-password-1", "ben": "ben-password-1"}
PAYLOADS = [
    "<script>window.__pwned=1</script>",
    '"><img src=x onerror="window.__pwned=2">',
    "<svg/onload=alert(3)>",
    "javascript:alert(4)",
    "</textarea><script>alert(5)</script>",
]
_CSRF_RE = re.compile(r'name="csrf_token" value="([^"]+)"')


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("security"), worker=False) as srv:
        srv.add_users(PW, admins=("ada",))
        yield srv


def _assert_inert(text: str, where: str) -> None:
    """No payload appears as markup; the ones that are pure markup appear escaped."""
    for p in PAYLOADS:
        if "<" in p or '"' in p:
            assert p not in text, (where, p)
    assert "<script>window.__pwned" not in text and "onerror=\"window" not in text, where


def test_cookies_are_secure_when_served_over_https(tmp_path) -> None:
    with running_server(tmp_path / "https", worker=False,
                        env={"RAWPROOF_SECURE_COOKIES": "1"}) as srv:
        srv.add_user("ada", PW["ada"])
        c = srv.client()
        page = c.get("/login")
        login_cookie = page.headers["set-cookie"]
        token = _CSRF_RE.search(page.text).group(1)
        # a Secure cookie is not sent back over plain HTTP by the client: send it by hand
        login_csrf = c.cookies.get("rawproof_login_csrf") or ""
        r = c.post("/login", data={"name": "ada", "password": PW["ada"], "csrf_token": token},
                   headers={"cookie": f"rawproof_login_csrf={login_csrf}"})
        assert r.status_code == 303, r.text[:300]
        session_cookie = [v for k, v in r.headers.multi_items() if k == "set-cookie"
                          and v.startswith("rawproof_session=")][0]
        for header in (login_cookie, session_cookie):
            attrs = [a.strip().lower() for a in header.split(";")]
            assert "secure" in attrs and "httponly" in attrs and "samesite=lax" in attrs, header


def test_script_payloads_are_escaped_everywhere(server) -> None:
    ada, ben = server.login("ada", PW["ada"]), server.login("ben", PW["ben"])
    name = PAYLOADS[0] + " set"
    info = ada.upload_files(name, [(PAYLOADS[1] + ".npy", zero_filled_npy(601)),
                                   (PAYLOADS[2] + "/scan.npy", zero_filled_npy(602))],
                            source=PAYLOADS[3], licence=PAYLOADS[4],
                            description=PAYLOADS[1], intended_use=PAYLOADS[2])
    ds = info["dataset_id"]
    for p in PAYLOADS:
        r = ben.post_form(f"/datasets/{ds}/comments", {"body": p})
        assert r.status_code == 303
    # a trace anchor that is no trace id is refused, and the refusal page stays inert
    r = ben.post_form(f"/datasets/{ds}/comments", {"body": "anchored", "trace_id": PAYLOADS[0]})
    assert r.status_code == 422
    assert "That trace id is not one rawproof knows." in r.text
    _assert_inert(r.text, "refused comment")
    r = ben.post_form(f"/datasets/{ds}/decisions", {
        "outcome": "rejected", "rationale": PAYLOADS[0], "expected_current_id": "0"},
        page=f"/datasets/{ds}")
    assert r.status_code == 303
    r = ben.post_form("/account/tokens", {"label": PAYLOADS[1]})
    assert r.status_code == 200  # the page that shows the new token once
    _assert_inert(r.text, "new token page")
    # a refused upload re-renders its form with what was typed
    r = ada.post("/upload", data={"csrf_token": ada.csrf("/upload"), "name": PAYLOADS[1],
                                  "source": ""}, files=[("files", ("a.npy", b"x"))])
    assert r.status_code == 422
    _assert_inert(r.text, "upload form")
    assert html.escape(PAYLOADS[1], quote=True) in r.text or "&#34;&gt;&lt;img" in r.text \
        or "&quot;&gt;&lt;img" in r.text
    pages = {"registry": ada.get("/"), "dataset": ada.get(f"/datasets/{ds}"),
             "search": ada.get("/", params={"q": PAYLOADS[0]}),
             "account": ben.get("/account"), "audit": ada.get("/admin/audit"),
             "api": ada.get(f"/api/datasets/{ds}"), "decisions": ada.get(
                 f"/datasets/{ds}/decisions.json")}
    for where, resp in pages.items():
        assert resp.status_code == 200, where
        if where in ("api", "decisions"):
            assert resp.headers["content-type"].startswith("application/json"), where
            continue
        assert resp.headers["content-type"].startswith("text/html"), where
        _assert_inert(resp.text, where)
    page = pages["dataset"].text
    assert "&lt;script&gt;window.__pwned=1&lt;/script&gt;" in page
    assert 'href="javascript:' not in page  # the source is shown, not linked
    assert "&lt;svg/onload=alert(3)&gt;" in page


def test_downloads_are_inert_attachments(server) -> None:
    ada = server.login("ada", PW["ada"])
    page_html = b"<html><script>window.__pwned=1</script></html>"
    svg = b'<svg xmlns="http://www.w3.org/2000/svg" onload="alert(1)"/>'
    info = ada.upload_files("Downloads", [
        ("page.html", page_html), ("image.svg", svg),
        ('evil"\r\nSet-Cookie: stolen=1\r\nX-Injected: 1.npy', zero_filled_npy(603))])
    files = ada.get(f"/api/datasets/{info['dataset_id']}").json()["files"]
    assert len(files) == 3
    for f in files:
        r = ada.get(f"/files/{f['id']}/download")
        assert r.status_code == 200
        assert r.headers["content-type"] == "application/octet-stream"
        assert r.headers["x-content-type-options"] == "nosniff"
        disp = r.headers["content-disposition"]
        assert disp.startswith("attachment;"), disp
        assert "\r" not in disp and "\n" not in disp and disp.count('"') == 2, disp
        assert "stolen" not in r.headers.get("set-cookie", "")
        assert "x-injected" not in r.headers
        assert hashlib.sha256(r.content).hexdigest() == f["sha256"]


def test_uploaded_names_never_choose_a_served_path(server) -> None:
    ada = server.login("ada", PW["ada"])
    app_js = (REPO / "static" / "app.css").read_bytes()
    evil = b"window.__pwned = 1;"
    info = ada.upload_files("Paths", [("../../static/evil.js", evil),
                                      ("static/app.css", evil + b"/* 2 */"),
                                      ("/etc/evil.npy", zero_filled_npy(604))])
    assert ada.get("/static/evil.js").status_code == 404
    assert ada.get("/static/app.css").content == app_js
    assert (REPO / "static" / "app.css").read_bytes() == app_js
    assert not (REPO / "static" / "evil.js").exists()
    assert not Path("/etc/evil.npy").exists()
    names = [f["name"] for f in ada.get(f"/api/datasets/{info['dataset_id']}").json()["files"]]
    assert all(not n.startswith("/") and ".." not in n.split("/") for n in names), names
    stored = [p for p in server.data_dir.rglob("*") if p.is_file()
              and p.name in ("evil.js", "app.css", "evil.npy")]
    assert stored == []  # bytes live under their sha256 only
    blob = server.data_dir / "store" / hashlib.sha256(evil).hexdigest()[:2] / \
        hashlib.sha256(evil).hexdigest()
    assert blob.read_bytes() == evil


def test_api_token_revoked_from_the_command_line(server) -> None:
    token = server.cli("users", "token", "ben", "--label", "cli").stdout.strip()
    api = server.client(headers={"authorization": f"Bearer {token}"})
    assert api.get("/api/me").json()["name"] == "ben"
    ben = server.login("ben", PW["ben"])
    ids = re.findall(r"/account/tokens/(\d+)/revoke", ben.get("/account").text)
    res = server.cli("users", "token", "ben", "--revoke", max(ids, key=int))
    assert "revoked" in res.stdout
    assert api.get("/api/me").status_code == 401
    assert api.post("/api/datasets/1/comments", json={"body": "after revoke"}).status_code == 401
