"""Cookie attributes when the lab serves rawproof over HTTPS (``secure_cookies``).

In-process through Starlette's test client on an ``https://`` base URL, since
a real HTTP server on 127.0.0.1 cannot carry Secure cookies back (RFC 6265,
section 4.1.2.5: a Secure cookie is only sent over a secure channel).
"""

from __future__ import annotations

import dataclasses
import re

from fastapi.testclient import TestClient

from app.config import Settings
from app.store import migrate, service
from app.store.db import session_scope
from app.web.app import create_app


def test_secure_setting_marks_every_cookie_secure(tmp_path) -> None:
    settings = dataclasses.replace(Settings(), data_dir=tmp_path / "data", database_url="",
                                   secure_cookies=True)
    migrate.upgrade(settings)
    with session_scope(settings) as db:
        service.create_user(db, "sam", "sam-password-1")
    with TestClient(create_app(settings), base_url="https://testserver") as client:
        page = client.get("/login")
        assert "secure" in page.headers["set-cookie"].lower()
        token = re.search(r'name="csrf_token" value="([^"]+)"', page.text).group(1)
        r = client.post("/login", data={"name": "sam", "password": "sam-password-1",
                                        "csrf_token": token}, follow_redirects=False)
        assert r.status_code == 303
        cookies = [v for k, v in r.headers.multi_items() if k == "set-cookie"]
        session_cookie = next(c for c in cookies if c.startswith("rawproof_session="))
        attrs = {a.strip().lower() for a in session_cookie.split(";")[1:]}
        assert {"httponly", "secure", "samesite=lax", "path=/"} <= attrs
        assert client.get("/").status_code == 200
