"""The ``users`` sub-command of ``rawproof``: accounts, made by a lab admin.

    rawproof users add NAME [--admin] [--password PW] [--display-name TEXT]
    rawproof users list | disable NAME | enable NAME
    rawproof users token NAME [--label L] [--may-create-tokens] [--revoke ID]
"""

from __future__ import annotations

import argparse
import getpass
import sys
from typing import Any

from app.cli.common import EXIT_BAD_INPUT, EXIT_OK, Command, add_common, migrate, settings_from


def _add_users(p: argparse.ArgumentParser) -> None:
    add_common(p)
    sub = p.add_subparsers(dest="users_command", required=True)
    add = sub.add_parser("add", help="create an account")
    add.add_argument("name")
    add.add_argument("--admin", action="store_true", help="a lab admin (manages accounts)")
    add.add_argument("--password", help="for scripts; prompted when left out")
    add.add_argument("--display-name", default="")
    sub.add_parser("list", help="list accounts")
    for verb in ("disable", "enable"):
        sp = sub.add_parser(verb, help=f"{verb} an account")
        sp.add_argument("name")
    tok = sub.add_parser("token", help="create (or revoke) an API token for scripts")
    tok.add_argument("name")
    tok.add_argument("--label", default="")
    tok.add_argument("--revoke", type=int, metavar="ID", help="revoke token ID instead")
    tok.add_argument("--may-create-tokens", action="store_true",
                     help="the token may create further tokens (off by default: a token "
                          "that leaks then cannot mint tokens that outlive its revocation)")
    for sp in sub.choices.values():
        add_common(sp, nested=True)


def _run_users(args: Any) -> int:
    from app.store import service
    from app.store.db import session_scope
    from app.store.errors import StoreError
    from app.store.models import User

    settings = settings_from(args)
    rc = migrate(settings)
    if rc is not None:
        return rc
    try:
        with session_scope(settings) as db:
            cmd = args.users_command
            if cmd == "add":
                password = args.password
                if password is None:
                    if not sys.stdin.isatty():
                        # getpass would fall back to reading stdin and raise at its end
                        print("rawproof: no terminal to ask for a password; pass "
                              "--password PW (for scripts)", file=sys.stderr)
                        return EXIT_BAD_INPUT
                    password = getpass.getpass(f"Password for {args.name}: ")
                    if getpass.getpass("Again: ") != password:
                        print("rawproof: the passwords differ", file=sys.stderr)
                        return EXIT_BAD_INPUT
                user = service.create_user(db, args.name, password, admin=args.admin,
                                           display_name=args.display_name)
                print(f"created {'admin ' if user.is_admin else ''}account {user.name}")
            elif cmd == "list":
                for u in db.query(User).order_by(User.name):
                    flags = ",".join(f for f, on in (("admin", u.is_admin),
                                                     ("disabled", not u.is_active)) if on)
                    print(f"{u.name:<24}{u.display_name:<32}{flags}")
            elif cmd in ("disable", "enable"):
                service.set_active(db, service.get_user(db, args.name), cmd == "enable",
                                   actor=None)
                print(f"{cmd}d {args.name}")
            elif cmd == "token":
                user = service.get_user(db, args.name)
                if args.revoke is not None:
                    service.revoke_api_token(db, user, args.revoke, actor=user)
                    print(f"revoked token {args.revoke}")
                else:
                    row, token = service.create_api_token(
                        db, user, args.label, may_create_tokens=args.may_create_tokens)
                    print(token)
                    scope = ("; it may create tokens" if row.may_create_tokens else
                             "; it cannot create tokens")
                    print(f"token id {row.id}; shown once, keep it secret{scope}",
                          file=sys.stderr)
    except StoreError as exc:
        print(f"rawproof: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    return EXIT_OK


USERS = Command("users", "accounts: add, list, disable, enable, API tokens", _add_users,
                _run_users)
