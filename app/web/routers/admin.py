"""Lab admins: accounts (create, disable, enable, admin, password reset), the audit log."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import RedirectResponse
from sqlalchemy import select

from app.store import service
from app.store.errors import NotFoundError, StoreError, ValidationError
from app.store.models import AuditEvent, User
from app.web.deps import AdminUser, DbSession, csrf_protect, require_admin
from app.web.templating import render

router = APIRouter(prefix="/admin", tags=["admin"], dependencies=[Depends(require_admin)])
changes = [Depends(csrf_protect)]


def _users_page(request: Request, db, *, error=None, notice=None, form=None,  # noqa: ANN001
                status_code=200):
    users = list(db.scalars(select(User).order_by(User.name)))
    return render(request, "admin_users.html", {"users": users, "error": error,
                                                "notice": notice, "form": form or {}},
                  status_code=status_code)


@router.get("/users")
def users(request: Request, db: DbSession):
    return _users_page(request, db)


@router.post("/users", dependencies=changes)
def create_user(
    request: Request,
    db: DbSession,
    admin: AdminUser,
    name: Annotated[str, Form()] = "",
    display_name: Annotated[str, Form()] = "",
    password: Annotated[str, Form()] = "",
    is_admin: Annotated[str, Form()] = "",
):
    try:
        service.create_user(db, name, password, admin=bool(is_admin),
                            display_name=display_name, actor=admin)
    except StoreError as exc:
        db.rollback()
        return _users_page(request, db, error=exc.message, status_code=exc.status_code,
                           form={"name": name, "display_name": display_name})
    db.commit()
    return _users_page(request, db, notice=f"Account {name.strip()!r} created.")


def _target(db, user_id: int) -> User:  # noqa: ANN001
    user = db.get(User, user_id)
    if user is None:
        raise NotFoundError("There is no such account.")
    return user


@router.post("/users/{user_id}/active", dependencies=changes)
def set_active(user_id: int, db: DbSession, admin: AdminUser,
               active: Annotated[str, Form()] = ""):
    user = _target(db, user_id)
    if user.id == admin.id and not active:
        raise ValidationError("You cannot disable your own account.")
    service.set_active(db, user, bool(active), actor=admin)
    db.commit()
    return RedirectResponse("/admin/users", status_code=303)


@router.post("/users/{user_id}/admin", dependencies=changes)
def set_admin(user_id: int, db: DbSession, admin: AdminUser,
              is_admin: Annotated[str, Form()] = ""):
    user = _target(db, user_id)
    if user.id == admin.id and not is_admin:
        raise ValidationError("You cannot remove your own admin rights.")
    service.set_admin(db, user, bool(is_admin), actor=admin)
    db.commit()
    return RedirectResponse("/admin/users", status_code=303)


@router.post("/users/{user_id}/password", dependencies=changes)
def reset_password(request: Request, user_id: int, db: DbSession, admin: AdminUser,
                   password: Annotated[str, Form()] = ""):
    user = _target(db, user_id)
    try:
        service.set_password(db, user, password, actor=admin)
    except StoreError as exc:
        db.rollback()
        return _users_page(request, db, error=exc.message, status_code=exc.status_code)
    db.commit()
    return _users_page(request, db, notice=f"Password of {user.name!r} reset.")


@router.get("/audit")
def audit_log(request: Request, db: DbSession, limit: int = 300):
    events = list(db.scalars(select(AuditEvent).order_by(AuditEvent.id.desc())
                             .limit(max(1, min(limit, 5000)))))
    return render(request, "admin_audit.html", {"events": events})
