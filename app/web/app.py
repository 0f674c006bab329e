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
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException

import app as app_pkg
from app.config import Settings
from app.errors import InputError
from app.store.db import Database
from app.store.errors import StoreError
from app.web import evidence
from app.web.deps import MAX_ROW_ID, ForbiddenError, NotSignedInError, out_of_range_fields
from app.web.errors import error_body, store_error_code
from app.web.limits import RequestLimitsMiddleware, storage_failure
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


def _error(request: Request, status: int, title: str, message: str, *, code: str):
    if _wants_json(request):
        return JSONResponse(error_body(code, message), status_code=status)
    return render(request, "error.html", {"title": title, "message": message,
                                          "status": status}, status_code=status)


def _install_handlers(application: FastAPI) -> None:
    @application.exception_handler(NotSignedInError)
    async def _not_signed_in(request: Request, exc: NotSignedInError):
        if _wants_json(request):
            return JSONResponse(error_body("not_signed_in", str(exc)),
                                status_code=401, headers={"www-authenticate": "Bearer"})
        if request.method in ("GET", "HEAD"):
            target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        else:  # a form posted after the session ended: come back to the page it was on
            target = safe_next(urlsplit(request.headers.get("referer", "")).path or "/")
        return RedirectResponse(f"/login?next={quote(target, safe='')}", status_code=303)

    @application.exception_handler(ForbiddenError)
    async def _forbidden(request: Request, exc: ForbiddenError):
        return _error(request, 403, "Not allowed", str(exc), code="forbidden")

    @application.exception_handler(CsrfError)
    async def _csrf(request: Request, exc: CsrfError):
        return _error(request, 403, "Form expired", str(exc), code="form_expired")

    @application.exception_handler(StoreError)
    async def _store(request: Request, exc: StoreError):
        return _error(request, exc.status_code, exc.title, exc.message,
                      code=store_error_code(exc))

    @application.exception_handler(InputError)
    async def _input(request: Request, exc: InputError):
        return _error(request, 400, "Cannot read the input", exc.message, code=exc.code)

    @application.exception_handler(OperationalError)
    @application.exception_handler(OSError)
    async def _storage(request: Request, exc: Exception):
        failure = storage_failure(exc)  # a full disk 507, an unwritable database 503
        if failure is None:
            raise exc
        status, code, message = failure
        return _error(request, status, "Cannot save now", message, code=code)

    @application.exception_handler(OverflowError)
    async def _overflow(request: Request, exc: OverflowError):
        # An id past 2^63 - 1 reaches the database driver, which cannot hold it.
        fields = ", ".join(out_of_range_fields(request)) or "a number in the request"
        return _error(request, 422, "Bad request", f"These fields are out of range: {fields} "
                      f"(ids are at most {MAX_ROW_ID}).", code="invalid_request")

    @application.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError):
        fields = ", ".join(".".join(str(p) for p in e.get("loc", ())) for e in exc.errors())
        return _error(request, 422, "Bad request", f"These fields are missing or malformed: "
                      f"{fields or 'unknown'}.", code="invalid_request")

    @application.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException):
        titles = {404: "Not found", 405: "Method not allowed"}
        codes = {404: "not_found", 405: "method_not_allowed"}
        return _error(request, exc.status_code, titles.get(exc.status_code, "Error"),
                      str(exc.detail) if exc.status_code != 404 else
                      "There is no page at this address.",
                      code=codes.get(exc.status_code, "http_error"))


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the web application for ``settings`` (the database must already be migrated)."""
    settings = settings or Settings()
    application = FastAPI(title="rawproof", version=app_pkg.__version__, docs_url=None,
                          redoc_url=None, openapi_url=None)
    application.state.settings = settings
    application.state.database = Database(settings.db_url)
    application.state.login_limiter = LoginLimiter()
    application.add_middleware(RequestLimitsMiddleware,
                               max_upload_bytes=settings.max_upload_bytes)
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
