"""Accounts: members, passwords, web sessions and API tokens."""

from __future__ import annotations

import re
from datetime import timedelta

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from app.store.audit import audit
from app.store.errors import NotFoundError, PermissionDeniedError, ValidationError
from app.store.models import ApiToken, User, WebSession, utcnow
from app.store.passwords import (
    MIN_LENGTH,
    hash_password,
    new_token,
    password_problem,
    token_digest,
    verify_password,
)

NAME_RE = re.compile(r"[a-z0-9][a-z0-9._-]{1,63}")
MIN_PASSWORD = MIN_LENGTH


def check_password(password: str, user_name: str) -> None:
    """Raise ``ValidationError`` unless ``password`` meets the policy
    (:func:`app.store.passwords.password_problem`, NIST SP 800-63B 5.1.1.2)."""
    problem = password_problem(password or "", user_name=user_name)
    if problem is not None:
        raise ValidationError(problem)


def create_user(
    session: Session,
    name: str,
    password: str,
    *,
    admin: bool = False,
    display_name: str | None = None,
    actor: User | None = None,
) -> User:
    """Create an account.

    Parameters
    ----------
    name : str
        Sign-in name: 2-64 characters of lower-case letters, digits, ``.``, ``_``, ``-``.
    password : str
        Meets :func:`check_password` (at least 12 characters, not common, not
        the name); stored as an argon2id hash.

    Raises
    ------
    ValidationError
        For a bad or taken name or a short password.
    """
    name = (name or "").strip()
    if not NAME_RE.fullmatch(name):
        raise ValidationError(
            "A user name is 2-64 characters: lower-case letters, digits, '.', '_' or '-', "
            "starting with a letter or digit."
        )
    check_password(password, name)
    if session.scalar(select(User.id).where(User.name == name)) is not None:
        raise ValidationError(f"There is already an account named {name!r}.")
    user = User(
        name=name,
        display_name=(display_name or "").strip()[:200],
        password_hash=hash_password(password),
        is_admin=bool(admin),
        is_active=True,
    )
    session.add(user)
    session.flush()
    audit(session, "user.create", actor=actor, user=name, admin=bool(admin))
    return user


def get_user(session: Session, name: str) -> User:
    user = session.scalar(select(User).where(User.name == name))
    if user is None:
        raise NotFoundError(f"There is no account named {name!r}.")
    return user


def authenticate(session: Session, name: str, password: str) -> User | None:
    """The active user with this name and password, or None."""
    user = session.scalar(select(User).where(User.name == (name or "").strip()))
    ok = verify_password(user.password_hash if user else None, password or "")
    if not ok or user is None or not user.is_active:
        return None
    return user


def set_password(session: Session, user: User, password: str, *, actor: User | None) -> None:
    """A new password; every session of the account ends.

    A reset by someone else (an admin, or ``actor=None`` from the command line)
    also revokes the account's API tokens: whoever held the old password may
    have made one. The member's own change keeps their tokens (the account page
    lists them for revoking).
    """
    check_password(password, user.name)
    user.password_hash = hash_password(password)
    session.execute(update(WebSession).where(WebSession.user_id == user.id).values(
        expires_at=utcnow()))
    revoked = 0
    if actor is None or actor.id != user.id:
        revoked = session.execute(
            update(ApiToken)
            .where(ApiToken.user_id == user.id, ApiToken.revoked_at.is_(None))
            .values(revoked_at=utcnow())
        ).rowcount
    audit(session, "user.password", actor=actor, user=user.name, tokens_revoked=revoked)


def set_active(session: Session, user: User, active: bool, *, actor: User | None) -> None:
    """Enable or disable an account; disabling ends its sessions and revokes its tokens."""
    user.is_active = bool(active)
    if not active:
        session.query(WebSession).filter(WebSession.user_id == user.id).delete()
        session.execute(
            update(ApiToken)
            .where(ApiToken.user_id == user.id, ApiToken.revoked_at.is_(None))
            .values(revoked_at=utcnow())
        )
    audit(session, "user.enable" if active else "user.disable", actor=actor, user=user.name)


def set_admin(session: Session, user: User, admin: bool, *, actor: User | None) -> None:
    user.is_admin = bool(admin)
    audit(session, "user.admin" if admin else "user.unadmin", actor=actor, user=user.name)


def create_web_session(session: Session, user: User, *, ttl: timedelta) -> tuple[WebSession, str]:
    """A new browser session; returns the row and the cookie value (shown once).

    Expired sessions of every member are deleted on the way.
    """
    session.query(WebSession).filter(WebSession.expires_at <= utcnow()).delete()
    token = new_token()
    row = WebSession(
        id=token_digest(token),
        user_id=user.id,
        csrf_token=new_token(24),
        expires_at=utcnow() + ttl,
    )
    session.add(row)
    session.flush()
    return row, token


def web_session_for(session: Session, token: str | None) -> WebSession | None:
    """The live session for a cookie value, or None."""
    if not token:
        return None
    row = session.get(WebSession, token_digest(token))
    if row is None or row.expires_at <= utcnow() or not row.user.is_active:
        return None
    return row


def end_web_session(session: Session, token: str | None) -> None:
    if token:
        session.query(WebSession).filter(WebSession.id == token_digest(token)).delete()


def create_api_token(session: Session, user: User, label: str = "", *,
                     may_create_tokens: bool = False, via: ApiToken | None = None
                     ) -> tuple[ApiToken, str]:
    """A new API token for ``user``; the plain token is returned once and never stored.

    Parameters
    ----------
    may_create_tokens : bool
        Whether the new token may itself make tokens (off unless asked for).
    via : ApiToken, optional
        The token the request was signed in with, when it was one: it must
        have ``may_create_tokens``, and its offspring cannot have more than it.

    Raises
    ------
    PermissionDeniedError
        When ``via`` may not make tokens.
    """
    if via is not None and not via.may_create_tokens:
        raise PermissionDeniedError(
            "This API token may not make new tokens; sign in with the password, or use a "
            "token made with that permission.")
    token = "rp_" + new_token()
    row = ApiToken(user_id=user.id, label=(label or "").strip()[:200],
                   token_hash=token_digest(token), prefix=token[:10],
                   may_create_tokens=bool(may_create_tokens))
    session.add(row)
    session.flush()
    audit(session, "token.create", actor=user, token_id=row.id, label=row.label,
          may_create_tokens=row.may_create_tokens, via_token=via.id if via else None)
    return row, token


def revoke_api_token(session: Session, user: User, token_id: int, *, actor: User) -> ApiToken:
    row = session.get(ApiToken, token_id)
    if row is None or (row.user_id != user.id):
        raise NotFoundError("There is no such API token.")
    if row.revoked_at is None:
        row.revoked_at = utcnow()
        audit(session, "token.revoke", actor=actor, token_id=row.id, user=user.name)
    return row


def api_token_row(session: Session, token: str | None) -> ApiToken | None:
    """The unrevoked token row of an active user for a plain token, or None."""
    if not token:
        return None
    row = session.scalar(select(ApiToken).where(ApiToken.token_hash == token_digest(token)))
    if row is None or row.revoked_at is not None or not row.user.is_active:
        return None
    return row


def user_for_api_token(session: Session, token: str | None) -> User | None:
    """The active user owning an unrevoked token, or None."""
    row = api_token_row(session, token)
    return row.user if row is not None else None
