"""Sign-in, sign-out and the member's own account page (password, API tokens)."""

from __future__ import annotations

from datetime import timedelta
from typing import Annotated

from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import RedirectResponse
from sqlalchemy import select

from app.store import service
from app.store.accounts import check_password
from app.store.errors import StoreError
from app.store.models import ApiToken, User
from app.web.deps import (
    CurrentUser,
    DbSession,
    SettingsDep,
    client_address,
    csrf_protect,
    current_user,
)
from app.web.ratelimit import RateLimited
from app.web.security import (
    LOGIN_CSRF_COOKIE,
    SESSION_COOKIE,
    check_csrf,
    cookie_args,
    csrf_token,
    safe_next,
)
from app.web.templating import render

SESSION_TTL = timedelta(days=7)

public = APIRouter(tags=["auth"])
router = APIRouter(tags=["account"], dependencies=[Depends(current_user)])


def _login_page(request: Request, *, error: str | None = None, name: str = "",
                next_url: str = "/", status_code: int = 200):
    resp = render(request, "login.html", {"error": error, "name": name, "next": next_url},
                  status_code=status_code)
    resp.set_cookie(LOGIN_CSRF_COOKIE, csrf_token(request), max_age=3600,
                    **cookie_args(request.app.state.settings.secure_cookies))
    return resp


@public.get("/login")
def login_form(request: Request, next: str = "/"):  # noqa: A002 - the query name
    return _login_page(request, next_url=safe_next(next))


@public.post("/login")
def login(
    request: Request,
    db: DbSession,
    settings: SettingsDep,
    name: Annotated[str, Form()] = "",
    password: Annotated[str, Form()] = "",
    csrf_token_field: Annotated[str, Form(alias="csrf_token")] = "",
    next: Annotated[str, Form()] = "/",  # noqa: A002
):
    check_csrf(request.cookies.get(LOGIN_CSRF_COOKIE), csrf_token_field)
    limiter = request.app.state.login_limiter
    address = client_address(request)
    name = name.strip()
    try:  # counted and recorded in one transaction, so parallel guesses cannot race it
        limiter.reserve(request.app.state.database, address, name)
    except RateLimited as exc:
        service.audit(db, "login.limited", name=name[:64], address=address)
        db.commit()
        resp = _login_page(request, error=str(exc), name=name, next_url=safe_next(next),
                           status_code=429)
        resp.headers["retry-after"] = str(exc.retry_after)
        return resp
    # The password check (argon2, deliberately slow) runs on a read session: the
    # request's write session takes SQLite's write lock at its first statement, and
    # holding it through the hash would queue every other writer behind sign-ins.
    with request.app.state.database.scope(write=False) as reader:
        checked = service.authenticate(reader, name, password)
        user_id = checked.id if checked is not None else None
    user = db.get(User, user_id) if user_id is not None else None
    if user is None:
        service.audit(db, "login.fail", name=name[:64], address=address)
        db.commit()
        return _login_page(request, error="That name and password do not match an active account.",
                           name=name, next_url=safe_next(next), status_code=401)
    # A new session id at every sign-in; any session the browser held is ended.
    service.end_web_session(db, request.cookies.get(SESSION_COOKIE))
    _row, token = service.create_web_session(db, user, ttl=SESSION_TTL)
    service.audit(db, "login.ok", actor=user, address=address)
    db.commit()
    resp = RedirectResponse(safe_next(next), status_code=303)
    resp.set_cookie(SESSION_COOKIE, token, max_age=int(SESSION_TTL.total_seconds()),
                    **cookie_args(settings.secure_cookies))
    resp.delete_cookie(LOGIN_CSRF_COOKIE, path="/")
    return resp


@router.post("/logout", dependencies=[Depends(csrf_protect)])
def logout(request: Request, db: DbSession, user: CurrentUser, settings: SettingsDep):
    service.end_web_session(db, request.cookies.get(SESSION_COOKIE))
    service.audit(db, "logout", actor=user)
    db.commit()
    resp = RedirectResponse("/login", status_code=303)
    resp.delete_cookie(SESSION_COOKIE, path="/", httponly=True, samesite="lax",
                       secure=settings.secure_cookies)
    return resp


def _account_page(request: Request, db, user, *, new_token: str | None = None,  # noqa: ANN001
                  error: str | None = None, notice: str | None = None, status_code: int = 200):
    tokens = list(db.scalars(select(ApiToken).where(ApiToken.user_id == user.id)
                             .order_by(ApiToken.id.desc())))
    return render(request, "account.html", {"tokens": tokens, "new_token": new_token,
                                            "error": error, "notice": notice},
                  status_code=status_code)


@router.get("/account")
def account(request: Request, db: DbSession, user: CurrentUser):
    return _account_page(request, db, user)


@router.post("/account/tokens", dependencies=[Depends(csrf_protect)])
def create_token(request: Request, db: DbSession, user: CurrentUser,
                 label: Annotated[str, Form()] = "",
                 may_create_tokens: Annotated[str, Form()] = ""):
    # A request signed in with a token needs that token's permission (issue 21, 10).
    _row, token = service.create_api_token(
        db, user, label, may_create_tokens=may_create_tokens == "on",
        via=getattr(request.state, "api_token", None))
    db.commit()
    return _account_page(request, db, user, new_token=token)


@router.post("/account/tokens/{token_id}/revoke", dependencies=[Depends(csrf_protect)])
def revoke_token(token_id: int, db: DbSession, user: CurrentUser):
    service.revoke_api_token(db, user, token_id, actor=user)
    db.commit()
    return RedirectResponse("/account", status_code=303)


@router.post("/account/password", dependencies=[Depends(csrf_protect)])
def change_password(
    request: Request,
    db: DbSession,
    user: CurrentUser,
    settings: SettingsDep,
    current: Annotated[str, Form()] = "",
    new: Annotated[str, Form()] = "",
):
    try:  # the new password's policy first: it needs no secret, so spends no attempt
        check_password(new, user.name)
    except StoreError as exc:
        return _account_page(request, db, user, error=exc.message, status_code=400)
    # The current-password check counts against the account's sign-in budget; the
    # request's transaction ends first, as the reservation takes the write lock itself.
    db.commit()
    try:
        request.app.state.login_limiter.reserve(request.app.state.database,
                                                client_address(request), user.name,
                                                kind="password")
    except RateLimited as exc:
        service.audit(db, "password.limited", name=user.name, address=client_address(request))
        db.commit()
        resp = _account_page(request, db, user, error=str(exc), status_code=429)
        resp.headers["retry-after"] = str(exc.retry_after)
        return resp
    if service.authenticate(db, user.name, current) is None:
        return _account_page(request, db, user, error="The current password is not right.",
                             status_code=400)
    try:
        service.set_password(db, user, new, actor=user)
    except StoreError as exc:
        return _account_page(request, db, user, error=exc.message, status_code=400)
    _row, token = service.create_web_session(db, user, ttl=SESSION_TTL)
    db.commit()
    resp = RedirectResponse("/account", status_code=303)
    resp.set_cookie(SESSION_COOKIE, token, max_age=int(SESSION_TTL.total_seconds()),
                    **cookie_args(settings.secure_cookies))
    return resp
