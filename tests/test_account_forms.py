"""The account and admin forms state the password rule in force; token scope from the
account page and from ``rawproof users token``.

Outside references: NIST SP 800-63B section 5.1.1.2 (memorised secrets: a
minimum length the verifier states and enforces; the project asks for 12,
app/store/passwords.py), the HTML ``minlength`` attribute (WHATWG HTML,
"the minlength and maxlength attributes"), and issue 21 finding 10 (a token
mints tokens only with ``may_create_tokens``).
"""

from __future__ import annotations

import re
from pathlib import Path

from app.cli.commands import main as rawproof
from app.store.db import session_scope
from app.store.models import ApiToken
from app.store.passwords import MIN_LENGTH
from tests.server_harness import inprocess_server

PASSWORD = "account-forms-test-pw-4"


def test_password_fields_state_the_policy_length(tmp_path: Path) -> None:
    """Every new-password field says the policy's length and enforces it with minlength;
    no form says the old 8."""
    assert MIN_LENGTH == 12
    with inprocess_server(tmp_path / "data") as srv:
        srv.add_users({"ada": PASSWORD}, admins=("ada",))
        ada = srv.login("ada", PASSWORD)
        for page in ("/account", "/admin/users"):
            html = ada.get(page).text
            fields = re.findall(r'<input[^>]*autocomplete="new-password"[^>]*>', html)
            assert fields, page
            for field in fields:
                assert f'minlength="{MIN_LENGTH}"' in field, (page, field)
            assert f"{MIN_LENGTH} characters or more" in html, page
            assert "8 characters" not in html and 'minlength="8"' not in html, page
        short = "Ab3$" * 2 + "xyz"  # 11 characters: the form refuses it, and so does the server
        assert len(short) == MIN_LENGTH - 1
        r = ada.post_form("/account/password", {"current": PASSWORD, "new": short})
        assert r.status_code == 400 and f"at least {MIN_LENGTH} characters" in r.text


def test_account_page_token_may_create_tokens_checkbox(tmp_path: Path) -> None:
    """The checkbox sends may_create_tokens=on; the token table says which tokens may
    create tokens; an unticked box gives a token that may not."""
    with inprocess_server(tmp_path / "data") as srv:
        srv.add_user("bea", PASSWORD)
        bea = srv.login("bea", PASSWORD)
        html = bea.get("/account").text
        box = re.search(r'<input[^>]*name="may_create_tokens"[^>]*>', html)
        assert box and 'type="checkbox"' in box.group(0) and 'value="on"' in box.group(0)
        assert re.search(r'<label[^>]*for="t-may-create"', html)
        bea.post_form("/account/tokens", {"label": "minter", "may_create_tokens": "on"})
        page = bea.post_form("/account/tokens", {"label": "plain"}).text
        with session_scope(srv.settings) as db:
            scope = {t.label: t.may_create_tokens for t in db.query(ApiToken)}
        assert scope == {"minter": True, "plain": False}
        rows = re.findall(r"<tr>\s*<td>(minter|plain)</td>.*?</tr>", page, re.S)
        assert sorted(rows) == ["minter", "plain"]
        cells = {m.group(1): m.group(2) for m in re.finditer(
            r"<tr>\s*<td>(minter|plain)</td>(?:\s*<td>.*?</td>){2}\s*<td>(yes|no)</td>", page,
            re.S)}
        assert cells == {"minter": "yes", "plain": "no"}


def test_cli_token_may_create_tokens_option(tmp_path: Path, capsys) -> None:  # noqa: ANN001
    """``rawproof users token NAME --may-create-tokens`` makes a token with the
    permission; without the flag the token has none; stderr says which."""
    data = str(tmp_path / "data")
    assert rawproof(["users", "add", "cy", "--password", PASSWORD, "--data", data]) == 0
    capsys.readouterr()
    assert rawproof(["users", "token", "cy", "--label", "ci", "--may-create-tokens",
                     "--data", data]) == 0
    said = capsys.readouterr()
    assert said.out.strip().startswith("rp_") and "it may create tokens" in said.err
    assert rawproof(["users", "token", "cy", "--label", "read", "--data", data]) == 0
    assert "it cannot create tokens" in capsys.readouterr().err
    with inprocess_server(Path(data)) as srv, session_scope(srv.settings) as db:
        scope = {t.label: t.may_create_tokens for t in db.query(ApiToken)}
    assert scope == {"ci": True, "read": False}
