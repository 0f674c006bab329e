"""The FastAPI application factory: ``create_app(settings)``.

Every route except ``/login``, ``/healthz`` and ``/static`` needs a signed-in
member; pages redirect to the sign-in form, JSON callers get 401.
"""

from __future__ import annotations

from urllib.parse import quote, urlsplit

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, PlainTextResponse, RedirectResponse
from fastapi.staticfiles import StaticFiles
from starlette.exceptions import HTTPException as StarletteHTTPException

import app as app_pkg
from app.config import Settings
from app.errors import InputError
from app.store.db import Database
from app.store.errors import StoreError
from app.web import evidence
from app.web.deps import ForbiddenError, NotSignedInError
from app.web.paths import STATIC_DIR
from app.web.ratelimit import LoginLimiter
from app.web.routers import admin, api, auth, datasets, exports, registry, reviews, uploads
from app.web.security import CsrfError, SecurityHeadersMiddleware, safe_next
from app.web.templating import render

PUBLIC_PATHS = ("/login", "/healthz", "/static")


def _wants_json(request: Request) -> bool:
    return (request.url.path.startswith("/api/")
            or "application/json" in request.headers.get("accept", "")
            or request.headers.get("authorization", "").lower().startswith("bearer "))


def _error(request: Request, status: int, title: str, message: str):
    if _wants_json(request):
        return JSONResponse({"error": {"code": title, "message": message}}, status_code=status)
    return render(request, "error.html", {"title": title, "message": message,
                                          "status": status}, status_code=status)


def _install_handlers(application: FastAPI) -> None:
    @application.exception_handler(NotSignedInError)
    async def _not_signed_in(request: Request, exc: NotSignedInError):
        if _wants_json(request):
            return JSONResponse({"error": {"code": "not_signed_in", "message": str(exc)}},
                                status_code=401, headers={"www-authenticate": "Bearer"})
        if request.method in ("GET", "HEAD"):
            target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        else:  # a form posted after the session ended: come back to the page it was on
            target = safe_next(urlsplit(request.headers.get("referer", "")).path or "/")
        return RedirectResponse(f"/login?next={quote(target, safe='')}", status_code=303)

    @application.exception_handler(ForbiddenError)
    async def _forbidden(request: Request, exc: ForbiddenError):
        return _error(request, 403, "Not allowed", str(exc))

    @application.exception_handler(CsrfError)
    async def _csrf(request: Request, exc: CsrfError):
        return _error(request, 403, "Form expired", str(exc))

    @application.exception_handler(StoreError)
    async def _store(request: Request, exc: StoreError):
        if _wants_json(request):
            return _error(request, exc.status_code, type(exc).__name__, exc.message)
        return _error(request, exc.status_code, exc.title, exc.message)

    @application.exception_handler(InputError)
    async def _input(request: Request, exc: InputError):
        return _error(request, 400, exc.code, exc.message)

    @application.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError):
        fields = ", ".join(".".join(str(p) for p in e.get("loc", ())) for e in exc.errors())
        return _error(request, 422, "Bad request", f"These fields are missing or malformed: "
                      f"{fields or 'unknown'}.")

    @application.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException):
        titles = {404: "Not found", 405: "Method not allowed"}
        return _error(request, exc.status_code, titles.get(exc.status_code, "Error"),
                      str(exc.detail) if exc.status_code != 404 else
                      "There is no page at this address.")


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the web application for ``settings`` (the database must already be migrated)."""
    settings = settings or Settings()
    application = FastAPI(title="rawproof", version=app_pkg.__version__, docs_url=None,
                          redoc_url=None, openapi_url=None)
    application.state.settings = settings
    application.state.database = Database(settings.db_url)
    application.state.login_limiter = LoginLimiter()
    application.add_middleware(SecurityHeadersMiddleware)
    _install_handlers(application)

    @application.get("/healthz", include_in_schema=False)
    def healthz():
        return PlainTextResponse("ok")

    application.include_router(auth.public)
    for mod in (auth, registry, datasets, uploads, reviews, api, admin, evidence, exports):
        application.include_router(mod.router)
    application.include_router(api.uploads_router)
    application.mount("/static", StaticFiles(directory=str(STATIC_DIR)), name="static")
    return application
