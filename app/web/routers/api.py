"""JSON endpoints for lab scripts (per-user API token: ``Authorization: Bearer rp_...``).

Cookie-authenticated calls that change data need the ``X-CSRF-Token`` header.
Uploads use ``POST /upload`` (or ``POST /api/uploads``) with multipart form data.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Body, Depends, Request
from fastapi.responses import JSONResponse

from app.store import service
from app.store.errors import DecisionConflictError, NotFoundError
from app.store.registry import filter_rows, registry_rows
from app.web.deps import (
    CurrentUser,
    DbSession,
    SettingsDep,
    StreamingUser,
    csrf_protect,
    current_user,
)
from app.web.routers.datasets import (
    decision_json,
    decisions_export,
    job_status,
    with_methods_statement,
)
from app.web.routers.uploads import upload

router = APIRouter(prefix="/api", tags=["api"], dependencies=[Depends(current_user)])
# The streaming upload checks its user itself, without the request's write session.
uploads_router = APIRouter(prefix="/api", tags=["api"])


def _row_json(r) -> dict[str, Any]:  # noqa: ANN001
    return {
        "id": r.id, "name": r.name, "source": r.source, "licence": r.licence,
        "uploader": r.uploader, "created_at": r.created_at.isoformat() + "Z",
        "updated_at": r.updated_at.isoformat() + "Z", "size": r.size, "n_files": r.n_files,
        "formats": r.formats, "verdict": r.verdict, "traces": r.traces,
        "decision": r.decision, "decided_by": r.decided_by, "job_state": r.job_state,
        "url": f"/datasets/{r.id}",
    }


@router.get("/me")
def me(user: CurrentUser):
    return {"name": user.name, "display_name": user.display_name, "admin": user.is_admin}


@router.get("/datasets")
def list_datasets(db: DbSession, q: str = "", decision: str = "", trace: str = "",
                  uploader: str = ""):
    rows = filter_rows(registry_rows(db), q=q, decision=decision, trace=trace, uploader=uploader)
    return {"datasets": [_row_json(r) for r in rows]}


@router.get("/datasets/{dataset_id}")
def get_dataset(dataset_id: int, db: DbSession):
    ds = service.get_dataset(db, dataset_id)
    rep = service.get_current_report(db, ds.id)
    cur = service.current_decision(db, ds)
    return {
        "id": ds.id, "name": ds.name, "source": ds.source, "licence": ds.licence,
        "description": ds.description, "intended_use": ds.intended_use,
        "uploader": ds.uploader.name, "created_at": ds.created_at.isoformat() + "Z",
        "files": [{"id": f.id, "name": f.relative_name, "sha256": f.file.sha256,
                   "size": f.file.size, "format": f.file.format} for f in ds.files],
        "job": job_status(service.latest_job(db, ds.id)),
        "report_id": rep.id if rep else None,
        "verdict": rep.verdict if rep else None,
        "decision": decision_json(cur) if cur else None,
    }


@router.get("/datasets/{dataset_id}/report")
def get_report(dataset_id: int, db: DbSession):
    ds = service.get_dataset(db, dataset_id)
    rep = service.get_current_report(db, ds.id)
    if rep is None:
        raise NotFoundError("This dataset has no report yet.")
    return with_methods_statement(db, ds, rep.data)


@router.get("/datasets/{dataset_id}/reports")
def list_reports(dataset_id: int, db: DbSession):
    return {"reports": [
        {"id": r.id, "created_at": r.created_at.isoformat() + "Z",
         "tool_version": r.tool_version, "analyser_versions": r.analyser_versions,
         "verdict": r.verdict}
        for r in service.report_history(db, service.get_dataset(db, dataset_id).id)
    ]}


@router.get("/datasets/{dataset_id}/decisions")
def get_decisions(dataset_id: int, db: DbSession):
    return decisions_export(db, dataset_id)


@router.get("/datasets/{dataset_id}/comments")
def get_comments(dataset_id: int, db: DbSession):
    ds = service.get_dataset(db, dataset_id)
    return {"comments": [
        {"id": c.id, "author": c.author.name, "body": c.body, "trace_id": c.trace_id,
         "created_at": c.created_at.isoformat() + "Z"}
        for c in service.list_comments(db, ds.id)
    ]}


@router.post("/datasets/{dataset_id}/comments", status_code=201,
             dependencies=[Depends(csrf_protect)])
def post_comment(dataset_id: int, db: DbSession, user: CurrentUser,
                 payload: dict[str, Any] = Body(...)):  # noqa: B008
    ds = service.get_dataset(db, dataset_id)
    c = service.add_comment(db, dataset=ds, author=user, body=str(payload.get("body", "")),
                            trace_id=payload.get("trace_id"))
    db.commit()
    return {"id": c.id}


@router.post("/datasets/{dataset_id}/decisions", status_code=201,
             dependencies=[Depends(csrf_protect)])
def post_decision(dataset_id: int, db: DbSession, user: CurrentUser,
                  payload: dict[str, Any] = Body(...)):  # noqa: B008
    """Record a decision; pass ``expected_current_id`` (0 for none) to detect conflicts."""
    ds = service.get_dataset(db, dataset_id)
    expected = payload.get("expected_current_id")
    try:
        d = service.record_decision(
            db, dataset=ds, reviewer=user, outcome=str(payload.get("outcome", "")),
            rationale=str(payload.get("rationale", "")),
            expected_current_id=int(expected) if expected is not None else None)
    except DecisionConflictError as exc:
        db.rollback()
        cur = service.current_decision(db, service.get_dataset(db, dataset_id))
        return JSONResponse(status_code=409, content={
            "error": {"code": "DecisionConflictError", "message": exc.message},
            "current": decision_json(cur) if cur else None})
    db.commit()
    return decision_json(d)


@router.post("/datasets/{dataset_id}/reanalyse", status_code=202,
             dependencies=[Depends(csrf_protect)])
def reanalyse(dataset_id: int, db: DbSession, user: CurrentUser):
    job = service.request_reanalysis(db, service.get_dataset(db, dataset_id), user=user)
    db.commit()
    return job_status(job)


@uploads_router.post("/uploads", status_code=201)
async def api_upload(request: Request, user: StreamingUser, settings: SettingsDep):
    """The same streaming upload as ``POST /upload``, answering JSON."""
    return await upload(request, user, settings)
