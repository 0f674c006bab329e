"""Registering a candidate dataset: the upload form and the streaming upload endpoint."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse, RedirectResponse
from starlette.concurrency import run_in_threadpool

from app.config import Settings
from app.store import service
from app.store.db import Database
from app.store.errors import StoreError, ValidationError
from app.store.models import User
from app.web.deps import CurrentUser, SettingsDep, StreamingUser
from app.web.security import CSRF_FIELD, CSRF_HEADER, check_csrf
from app.web.templating import render
from app.web.upload_stream import UploadStream

# No router-wide user dependency: the streaming endpoint must not hold the
# request's write session (see app.web.deps.streaming_user); each route names its own.
router = APIRouter(tags=["uploads"])

FORM_FIELDS = ("name", "source", "licence", "description", "intended_use")


def _wants_json(request: Request) -> bool:
    """Scripts (token, ``/api/``, or asking for JSON) get JSON; a plain form post a redirect."""
    return ("application/json" in request.headers.get("accept", "")
            or getattr(request.state, "auth", None) == "token"
            or request.url.path.startswith("/api/"))


@router.get("/upload")
def upload_form(request: Request, user: CurrentUser, settings: SettingsDep):
    return render(request, "upload.html", {"max_bytes": settings.max_upload_bytes,
                                           "form": {}, "error": None})


def _create(database: Database, settings: Settings, user_id: int, fields: dict, files: list
            ) -> tuple[int, list[dict]]:
    with database.scope(write=True) as db:
        user = db.get(User, user_id)
        ds = service.create_dataset(db, settings, uploader=user, files=files,
                                    **{k: fields.get(k, "") for k in FORM_FIELDS})
        dups = [
            {"file": mine, "dataset_id": d.other_dataset_id,
             "dataset_name": d.other_dataset_name, "as": theirs,
             "decision": d.other_decision, "withdrawn": d.other_withdrawn}
            for d in service.duplicates_of(db, ds) for mine, theirs in d.files
        ]
        return ds.id, dups


@router.post("/upload", status_code=201)
async def upload(request: Request, user: StreamingUser, settings: SettingsDep):
    """Stream a multipart form (metadata fields, then files) into the store.

    The CSRF token (header ``X-CSRF-Token`` or the form's first field) must
    arrive before any file bytes are written. JSON clients (``Accept:
    application/json``) get ``{"dataset_id", "url", "duplicates"}``; browsers
    without JavaScript are redirected to the new dataset's page.
    """
    token_auth = getattr(request.state, "auth", None) == "token"
    expected = None if token_auth else request.state.web_session.csrf_token
    header_token = request.headers.get(CSRF_HEADER)

    def check(fields: dict[str, list[str]]) -> None:
        if not token_auth:
            check_csrf(expected, header_token or (fields.get(CSRF_FIELD) or [""])[0])
        # Refuse a form without its required fields before any file is stored.
        for key, label in (("name", "dataset name"), ("source", "source (citation or URL)")):
            if not (fields.get(key) or [""])[0].strip():
                raise ValidationError(f"The {label} is required.")

    if (not token_auth and header_token is None
            and not request.headers.get("content-type", "").startswith("multipart/form-data")):
        check_csrf(expected, None)  # no multipart body, so no token field can follow
    length = request.headers.get("content-length")
    if length and length.isdigit() and int(length) > settings.max_upload_bytes + 1024**2:
        return _error(request, settings, 413, ValidationError(
            f"The upload is larger than the limit of {settings.max_upload_bytes} bytes; "
            "nothing was stored."), {})
    parser = UploadStream(settings, request.headers.get("content-type", ""),
                          max_bytes=settings.max_upload_bytes, before_first_file=check)
    try:
        parsed = await parser.consume(request.stream())
        check(parsed.fields)  # again, for a form that carried no file at all
    except StoreError as exc:
        return _error(request, settings, exc.status_code, exc, parser.result.fields)
    except OSError as exc:  # the disk is full or the store cannot be written
        return _error(request, settings, 507, _storage_error(exc), parser.result.fields)
    fields = {k: parsed.first(k) for k in FORM_FIELDS}
    try:
        ds_id, dups = await run_in_threadpool(
            _create, request.app.state.database, settings, user.id, fields, parsed.files)
    except StoreError as exc:
        return _error(request, settings, exc.status_code, exc, parsed.fields)
    except OSError as exc:
        parser.abort()
        return _error(request, settings, 507, _storage_error(exc), parsed.fields)
    url = f"/datasets/{ds_id}"
    if _wants_json(request):
        return JSONResponse({"dataset_id": ds_id, "url": url, "duplicates": dups},
                            status_code=201)
    return RedirectResponse(url, status_code=303)


def _storage_error(exc: OSError) -> ValidationError:
    """A write failure of the store (RFC 4918 11.5: 507 Insufficient Storage)."""
    reason = exc.strerror or type(exc).__name__
    return ValidationError(f"The server could not write the upload to its store ({reason}); "
                           "nothing was stored. Tell the lab admin: the disk may be full.")


def _error(request: Request, settings: Settings, status: int, exc: StoreError,
           fields: dict[str, list[str]]):
    if _wants_json(request):
        from app.web.errors import error_body, store_error_code

        code = {413: "upload_too_large", 507: "storage_full"}.get(status, store_error_code(exc))
        return JSONResponse(error_body(code, exc.message), status_code=status)
    form = {k: (fields.get(k) or [""])[0] for k in FORM_FIELDS}
    return render(request, "upload.html", {"max_bytes": settings.max_upload_bytes,
                                           "form": form, "error": exc.message},
                  status_code=status)
