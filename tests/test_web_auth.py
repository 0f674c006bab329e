"""Sign-in, sessions, CSRF, rate limit, API tokens and headers against a real server.

Outside references: RFC 6265 (cookie attributes HttpOnly, SameSite, Path),
the W3C Content Security Policy Level 3 directives (``script-src``,
``style-src``, ``frame-ancestors``), OWASP's session-management practice of a
new session id at sign-in (common practice, no source beyond OWASP's cheat
sheet, recalled from memory).
"""

from __future__ import annotations

import re

import httpx
import pytest
from fastapi.routing import APIRoute

from app.config import Settings
from app.web.app import create_app
from tests.server_harness import running_server, zero_filled_npy

pytestmark = pytest.mark.server

PW = {"ada": "ada-password-1", "ben": "ben-password-1", "cat": "cat-password-1",
      "limited": "limited-password-1"}
PUBLIC = {"/login", "/healthz"}


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    data = tmp_path_factory.mktemp("auth")
    with running_server(data, worker=False, env={"RAWPROOF_LOGIN_MAX_FAILURES": "3"}) as srv:
        srv.add_users(PW, admins=("ada",))
        yield srv


@pytest.fixture(scope="module")
def dataset_id(server) -> int:
    ben = server.login("ben", PW["ben"])
    return ben.upload_files("Auth test set", [("scan.npy", zero_filled_npy(21))])["dataset_id"]


def _routes(tmp_path_factory) -> list[tuple[str, str]]:
    """(method, path) of every route, path parameters set to 1.

    The app's OpenAPI description is its route table in public form; each
    router module's own route list is checked to be inside it, so that a
    route hidden from the schema would not escape the walk.
    """
    import importlib

    app = create_app(Settings(data_dir=tmp_path_factory.mktemp("routes")))
    paths = app.openapi()["paths"]
    modules = ["auth", "registry", "datasets", "uploads", "reviews", "api", "admin"]
    routers = [importlib.import_module(f"app.web.routers.{m}") for m in modules]
    declared = [r for mod in routers for name in ("router", "public", "uploads_router")
                for r in getattr(getattr(mod, name, None), "routes", [])]
    try:
        declared += importlib.import_module("app.web.evidence").router.routes
    except ModuleNotFoundError:
        pass
    for route in declared:
        if isinstance(route, APIRoute):
            path = re.sub(r"\{(\w+):\w+\}", r"{\1}", route.path)  # {id:int} -> {id}
            assert path in paths, f"{route.path} is missing from the route table"
    out = [("GET", "/healthz")]
    for path, methods in paths.items():
        for method in methods:
            out.append((method.upper(), re.sub(r"\{[^}]+\}", "1", path)))
    return out


def test_every_route_needs_a_signed_in_member(server, dataset_id, tmp_path_factory) -> None:
    """Walk the route table: without a session, pages redirect to sign-in, the API says 401."""
    routes = _routes(tmp_path_factory)
    assert len(routes) > 25
    anon = server.client()
    checked = 0
    for method, path in routes:
        if path in PUBLIC:
            continue
        r = anon.request(method, path, data={"csrf_token": "x", "body": "x"})
        if path.startswith("/api/"):
            assert r.status_code == 401, (method, path, r.status_code)
        else:
            assert r.status_code == 303, (method, path, r.status_code)
            assert r.headers["location"].startswith("/login?next="), (method, path)
        checked += 1
    assert checked == sum(1 for _, p in routes if p not in PUBLIC)
    # a bogus bearer token is no better than none
    r = anon.get("/api/datasets", headers={"authorization": "Bearer rp_not-a-token"})
    assert r.status_code == 401


def test_every_state_change_needs_the_csrf_token(server, dataset_id, tmp_path_factory) -> None:
    """Signed in by cookie but without (or with a wrong) CSRF token, every POST is refused."""
    ben = server.login("ben", PW["ben"])
    posts = [p for m, p in _routes(tmp_path_factory) if m == "POST" and p != "/login"]
    assert "/upload" in posts and "/datasets/1/decisions" in posts
    before = ben.get(f"/datasets/{dataset_id}/status").json()
    for path in posts:
        real = path.replace("/1/", f"/{dataset_id}/")
        for extra in ({}, {"csrf_token": "forged-token"}):
            r = ben.post(real, data={"name": "n", "source": "s", "body": "b", **extra},
                         files={"files": ("a.npy", b"x" * 10)})
            assert r.status_code == 403, (path, extra, r.status_code)
    r = ben.post("/login", data={"name": "ben", "password": PW["ben"]})
    assert r.status_code == 403  # the sign-in form has its own token
    assert ben.get(f"/datasets/{dataset_id}/status").json() == before
    assert "No comments yet" in ben.get(f"/datasets/{dataset_id}").text


def test_session_cookie_flags_and_rotation(server) -> None:
    """HttpOnly, SameSite=Lax, Path=/; a new session id at each sign-in, the old one dead."""
    c = server.login("cat", PW["cat"])
    first = c.cookies.get("rawproof_session")
    assert first
    r = c.get("/login")
    token = re.search(r'name="csrf_token" value="([^"]+)"', r.text).group(1)
    r = c.post("/login", data={"name": "cat", "password": PW["cat"], "csrf_token": token})
    assert r.status_code == 303
    header = r.headers["set-cookie"]
    assert "HttpOnly" in header and "samesite=lax" in header.lower() and "Path=/" in header
    assert "secure" not in header.lower().replace("samesite", "")
    second = c.cookies.get("rawproof_session")
    assert second and second != first
    stale = server.client(cookies={"rawproof_session": first})
    assert stale.get("/").status_code == 303
    assert c.get("/").status_code == 200


def test_sign_out_ends_the_session(server) -> None:
    c = server.login("cat", PW["cat"])
    token = c.cookies.get("rawproof_session")
    r = c.post_form("/logout", {})
    assert r.status_code == 303 and r.headers["location"] == "/login"
    assert server.client(cookies={"rawproof_session": token}).get("/").status_code == 303


def test_next_parameter_cannot_redirect_off_site(server) -> None:
    c = server.client()
    token = re.search(r'name="csrf_token" value="([^"]+)"', c.get("/login").text).group(1)
    r = c.post("/login", data={"name": "cat", "password": PW["cat"], "csrf_token": token,
                               "next": "//evil.example/steal"})
    assert r.status_code == 303 and r.headers["location"] == "/"


def test_failed_sign_ins_are_rate_limited(server) -> None:
    """With 3 free attempts, the 4th (even with the right password) must wait the stated
    delay (429, RFC 6585 section 4, with Retry-After); after it, the right password signs
    in: a delay, not a lock-out (NIST SP 800-63B section 5.2.2)."""
    import time

    c = server.client()

    def attempt(password: str) -> httpx.Response:
        token = re.search(r'name="csrf_token" value="([^"]+)"', c.get("/login").text).group(1)
        return c.post("/login", data={"name": "limited", "password": password,
                                      "csrf_token": token})

    assert [attempt("wrong-password").status_code for _ in range(3)] == [401, 401, 401]
    blocked = attempt(PW["limited"])
    assert blocked.status_code == 429
    wait = int(blocked.headers["retry-after"])
    assert 0 < wait <= 3
    assert "rawproof_session" not in c.cookies
    server.login("cat", PW["cat"])  # another name from the same address still signs in
    deadline = time.monotonic() + wait + 10
    while (r := attempt(PW["limited"])).status_code == 429 and time.monotonic() < deadline:
        time.sleep(0.25)  # refused attempts reserve nothing, so polling does not extend it
    assert r.status_code == 303


def test_security_headers_on_every_kind_of_response(server) -> None:
    """CSP without inline script/style, no framing, nosniff, a referrer policy."""
    ben = server.login("ben", PW["ben"])
    responses = [ben.get("/"), ben.get("/static/app.css"), ben.get("/no/such/page"),
                 server.client().get("/api/datasets"), server.client().get("/login")]
    for r in responses:
        csp = r.headers["content-security-policy"]
        assert "script-src 'self'" in csp and "style-src 'self'" in csp
        assert "unsafe-inline" not in csp and "frame-ancestors 'none'" in csp
        assert r.headers["x-content-type-options"] == "nosniff"
        assert r.headers["referrer-policy"] == "same-origin"
    assert responses[2].status_code == 404


def test_pages_have_no_inline_script_or_style(server, dataset_id) -> None:
    """What the CSP would block: inline <script>, <style>, style= and on*= attributes."""
    ada = server.login("ada", PW["ada"])
    for path in ("/", "/upload", f"/datasets/{dataset_id}", "/account", "/admin/users",
                 "/admin/audit", "/login"):
        html = ada.get(path).text
        assert not re.search(r"<script(?![^>]*\bsrc=)[^>]*>", html), path
        assert "<style" not in html and not re.search(r"\sstyle=", html), path
        assert not re.search(r"\son[a-z]+=", html), path


def test_api_token_works_until_revoked(server, dataset_id) -> None:
    """A bearer token acts as its member without CSRF (no cookie); revoking it ends that."""
    res = server.cli("users", "token", "ben", "--label", "script")
    token = res.stdout.strip()
    api = server.client(headers={"authorization": f"Bearer {token}"})
    assert api.get("/api/me").json()["name"] == "ben"
    r = api.post(f"/api/datasets/{dataset_id}/comments", json={"body": "from a script"})
    assert r.status_code == 201
    comments = api.get(f"/api/datasets/{dataset_id}/comments").json()["comments"]
    assert comments[-1]["body"] == "from a script" and comments[-1]["author"] == "ben"
    ben = server.login("ben", PW["ben"])
    page = ben.get("/account").text
    token_id = re.search(r'/account/tokens/(\d+)/revoke', page).group(1)
    assert ben.post_form(f"/account/tokens/{token_id}/revoke", {}).status_code == 303
    assert api.get("/api/me").status_code == 401


def test_admins_manage_accounts_and_members_cannot(server) -> None:
    ada = server.login("ada", PW["ada"])
    ben = server.login("ben", PW["ben"])
    assert ben.get("/admin/users").status_code == 403
    assert ben.post_form("/admin/users", {"name": "eve", "password": "eve-password-1"}
                         ).status_code == 403
    r = ada.post_form("/admin/users", {"name": "dan", "display_name": "Dan Ito",
                                       "password": "dan-password-1"})
    assert r.status_code == 200 and "Account &#39;dan&#39; created" in r.text
    dan = server.login("dan", "dan-password-1")
    assert dan.get("/").status_code == 200
    page = ada.get("/admin/users").text
    row = re.search(r"<code>dan</code>.*?/admin/users/(\d+)/active", page, re.S)
    assert row, "dan's row has a disable form"
    dan_id = row.group(1)
    assert ada.post_form(f"/admin/users/{dan_id}/active", {}).status_code == 303
    assert dan.get("/").status_code == 303  # the disabled member's session is gone
    c = server.client()
    token = re.search(r'name="csrf_token" value="([^"]+)"', c.get("/login").text).group(1)
    r = c.post("/login", data={"name": "dan", "password": "dan-password-1", "csrf_token": token})
    assert r.status_code == 401


def test_sign_in_budget_is_shared_by_server_processes(tmp_path) -> None:
    """Two limiters (as in two `serve --processes 2` processes) over one database count
    the same reserved attempts; the account's count holds across addresses, the wait
    doubles after the free attempts, and a success or a password reset starts it again
    (NIST SP 800-63B section 5.2.2: throttling by growing delays)."""
    from app.config import Settings
    from app.store import migrate, service
    from app.store.db import database
    from app.store.models import utcnow
    from app.web.ratelimit import LoginLimiter, RateLimited

    settings = Settings(data_dir=tmp_path)
    migrate.upgrade(settings)
    db = database(settings)
    with db.scope() as s:
        user = service.create_user(s, "dana", "dana-password-1")
    one = LoginLimiter(max_failures=2, window=60, delay=30, max_delay=50)
    two = LoginLimiter(max_failures=2, window=60, delay=30, max_delay=50)
    one.reserve(db, "10.0.0.7", "Dana")
    two.reserve(db, "10.0.0.8", "dana")  # the account's budget spans addresses
    with pytest.raises(RateLimited) as exc:
        one.reserve(db, "10.0.0.9", "DANA")
    assert 29 <= exc.value.retry_after <= 31
    two.reserve(db, "10.0.0.7", "erin")  # another account has its own budget
    with db.scope() as s:
        service.audit(s, "login.ok", actor=s.merge(user), address="10.0.0.7")
    one.reserve(db, "10.0.0.7", "dana")
    two.reserve(db, "10.0.0.7", "dana")
    now = utcnow()  # the wait after the free attempts doubles (30, 60 -> 50), at most 50
    assert one.wait_for([now] * 2, 2, now) == 30 and one.wait_for([now] * 3, 2, now) == 50
    with db.scope() as s:
        service.set_password(s, s.merge(user), "a-fresh-passphrase-9", actor=None)
    one.reserve(db, "10.0.0.7", "dana")  # the reset started the count again

