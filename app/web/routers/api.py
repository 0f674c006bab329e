"""The JSON API for lab scripts, described by OpenAPI at ``/api/openapi.json``.

Sign in with a per-user API token (``Authorization: Bearer rp_...``, made with
``rawproof users token NAME`` or on the Account page) or a browser session;
cookie-authenticated calls that change data need the ``X-CSRF-Token`` header.
Every error answers ``{"error": {"code": "<snake_case>", "message": "..."}}``
(:data:`app.web.errors.ERROR_CODES`). ``/api/docs`` is a readable page of the
same schema, for signed-in members. The README has a worked example.
"""

from __future__ import annotations

from typing import Any, Literal

from fastapi import APIRouter, Depends, Query, Request
from fastapi.openapi.utils import get_openapi
from fastapi.responses import JSONResponse
from pydantic import BaseModel, ConfigDict, Field

import app as app_pkg
from app import probe_jobs
from app.store import service
from app.store.errors import DecisionConflictError, NotFoundError
from app.store.queue_health import queue_health
from app.store.registry import SORTS, filter_rows, registry_rows
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
from app.web.templating import render

Outcome = Literal["fit_for_reconstruction", "downstream_only", "rejected"]


# ------------------------------------------------------------------ models
class ErrorDetail(BaseModel):
    code: str = Field(description="stable snake_case code, e.g. not_found, invalid_field, "
                                  "self_decision, decision_conflict")
    message: str = Field(description="one sentence a person can act on")


class ErrorOut(BaseModel):
    error: ErrorDetail


class MeOut(BaseModel):
    name: str
    display_name: str
    admin: bool


class QueueOut(BaseModel):
    pending: int = Field(description="jobs queued or running")
    stalled: bool = Field(description="jobs wait and no worker serves them")
    reason: Literal["worker_restarting", "storage_full", "read_only", "database_busy",
                    "queue_error", "no_heartbeat", "no_worker"] | None = None
    message: str = ""
    since: str | None = None


class JobOut(BaseModel):
    id: int
    state: Literal["queued", "running", "done", "failed"]
    attempts: int
    error: str | None = None
    progress: dict[str, Any] | None = None
    report_id: int | None = None
    created_at: str
    finished_at: str | None = None
    queue: QueueOut | None = Field(None, description="why a queued or running job waits")


class DecisionOut(BaseModel):
    id: int
    outcome: Outcome
    outcome_label: str
    rationale: str
    reviewer: str
    reviewer_label: str
    created_at: str
    previous_id: int | None = None


class DatasetRowOut(BaseModel):
    id: int
    name: str
    source: str
    licence: str
    uploader: str
    created_at: str
    updated_at: str
    size: int
    n_files: int
    formats: list[str]
    verdict: Literal["raw-like", "processed", "inconclusive"] | None = None
    traces: dict[str, str] = Field(description="trace id -> present | absent | inconclusive")
    decision: Outcome | None = None
    decided_by: str | None = None
    job_state: str | None = None
    withdrawn: bool = False
    probe_gap: float | None = Field(None, description="NRMSE gap of the latest bias probe")
    url: str


class DatasetListOut(BaseModel):
    datasets: list[DatasetRowOut]


class FileOut(BaseModel):
    id: int
    name: str
    sha256: str
    size: int
    format: str


class DatasetOut(BaseModel):
    id: int
    name: str
    source: str
    licence: str
    description: str
    intended_use: str
    uploader: str
    created_at: str
    withdrawn_at: str | None = None
    withdrawn_reason: str = ""
    files: list[FileOut]
    job: JobOut | None = None
    report_id: int | None = None
    verdict: str | None = None
    decision: DecisionOut | None = None


class ReportInfoOut(BaseModel):
    id: int
    created_at: str
    tool_version: str
    analyser_versions: dict[str, Any]
    verdict: str


class ReportListOut(BaseModel):
    reports: list[ReportInfoOut]


class CommentIn(BaseModel):
    model_config = ConfigDict(extra="forbid")
    body: str = Field(min_length=1, max_length=20_000, description="plain text")
    trace_id: str | None = Field(None, description="a trace id of the report, or null")


class CommentOut(BaseModel):
    id: int
    author: str
    body: str
    trace_id: str | None = None
    created_at: str


class CommentListOut(BaseModel):
    comments: list[CommentOut]


class CreatedOut(BaseModel):
    id: int


class DecisionIn(BaseModel):
    model_config = ConfigDict(extra="forbid")
    outcome: Outcome
    rationale: str = Field(min_length=1, description="the caveats a paper must report")
    expected_current_id: int | None = Field(
        None, ge=0, le=2**63 - 1,
        description="the current decision's id you saw (0 for none); a different "
                          "current decision answers 409 decision_conflict")


class DecisionHistoryOut(BaseModel):
    schema_: str = Field(alias="schema")
    dataset: dict[str, Any]
    current: DecisionOut | None = None
    history: list[DecisionOut]
    caution: str


class DatasetEditIn(BaseModel):
    model_config = ConfigDict(extra="forbid")
    name: str | None = None
    source: str | None = None
    licence: str | None = None
    description: str | None = None
    intended_use: str | None = None


class WithdrawIn(BaseModel):
    model_config = ConfigDict(extra="forbid")
    reason: str = Field(min_length=1, max_length=2000)


class ProbeIn(BaseModel):
    model_config = ConfigDict(extra="forbid")
    acceleration: float = Field(4.0, description="nominal R: 2, 3, 4, 6 or 8")
    family: Literal["polynomial", "gaussian", "uniform", "equispaced"] = "polynomial"
    slices: int = Field(8, ge=1, le=probe_jobs.MAX_SLICES)


class ProbeOut(BaseModel):
    id: int
    state: Literal["queued", "running", "done", "failed"]
    acceleration: float
    family: str
    slices: int
    progress: dict[str, Any] | None = None
    error: str | None = None
    report_id: int | None = None
    gap: float | None = None
    result: dict[str, Any] | None = Field(None, description="the rawproof.probe/1 object")
    created_at: str
    finished_at: str | None = None


class UploadOut(BaseModel):
    dataset_id: int
    url: str
    duplicates: list[Any]


ERRORS: dict[int | str, dict[str, Any]] = {
    code: {"model": ErrorOut} for code in (401, 403, 404, 409, 422)}

router = APIRouter(prefix="/api", tags=["api"], dependencies=[Depends(current_user)],
                   responses=ERRORS)
# The streaming upload checks its user itself, without the request's write session.
uploads_router = APIRouter(prefix="/api", tags=["api"], responses=ERRORS)


def _row_json(r) -> dict[str, Any]:  # noqa: ANN001
    return {
        "id": r.id, "name": r.name, "source": r.source, "licence": r.licence,
        "uploader": r.uploader, "created_at": r.created_at.isoformat() + "Z",
        "updated_at": r.updated_at.isoformat() + "Z", "size": r.size, "n_files": r.n_files,
        "formats": r.formats, "verdict": r.verdict, "traces": r.traces,
        "decision": r.decision, "decided_by": r.decided_by, "job_state": r.job_state,
        "withdrawn": r.withdrawn, "probe_gap": r.gap, "url": f"/datasets/{r.id}",
    }


# ------------------------------------------------------------------ schema and docs
def api_schema(request: Request) -> dict[str, Any]:
    """The OpenAPI document of the ``/api`` routes (built once per application)."""
    application = request.app
    cached = getattr(application.state, "api_schema", None)
    if cached is None:
        full = get_openapi(
            title="rawproof JSON API", version=app_pkg.__version__, routes=application.routes,
            description=(__doc__ or "") + "\n\n" + app_pkg.CAUTION)
        cached = dict(full)
        cached["paths"] = {p: v for p, v in full.get("paths", {}).items()
                           if p.startswith("/api/")}
        comps = dict(full.get("components") or {})
        comps["schemas"] = {k: v for k, v in (comps.get("schemas") or {}).items()
                            if not k.startswith("Body_")}
        cached["components"] = comps
        cached["components"].setdefault("securitySchemes", {})["token"] = {
            "type": "http", "scheme": "bearer"}
        cached["security"] = [{"token": []}]
        application.state.api_schema = cached
    return cached


@router.get("/openapi.json")
def openapi_json(request: Request):
    """This OpenAPI document."""
    return JSONResponse(api_schema(request))


@router.get("/docs")
def api_docs(request: Request):
    """A readable page of the API, generated from the OpenAPI document."""
    schema = api_schema(request)
    ops = []
    for path, item in schema["paths"].items():
        for method, op in item.items():
            body = (((op.get("requestBody") or {}).get("content") or {})
                    .get("application/json", {}).get("schema", {}).get("$ref", ""))
            ok = next((v for k, v in op.get("responses", {}).items() if k.startswith("2")), {})
            out = ((ok.get("content") or {}).get("application/json", {})
                   .get("schema", {}).get("$ref", ""))
            ops.append({"method": method.upper(), "path": path,
                        "summary": op.get("summary", ""),
                        "description": op.get("description", ""),
                        "params": [p for p in op.get("parameters", [])],
                        "body": body.rsplit("/", 1)[-1], "out": out.rsplit("/", 1)[-1]})
    models = {name: m for name, m in schema["components"]["schemas"].items()
              if not name.startswith(("HTTPValidationError", "ValidationError"))}
    return render(request, "api_docs.html", {"ops": ops, "models": models})


# ------------------------------------------------------------------ routes
@router.get("/me", response_model=MeOut)
def me(user: CurrentUser):
    """The signed-in member."""
    return {"name": user.name, "display_name": user.display_name, "admin": user.is_admin}


@router.get("/datasets", response_model=DatasetListOut)
def list_datasets(db: DbSession, q: str = "", decision: str = "", trace: str = "",
                  uploader: str = "",
                  sort: str = Query("updated", description="one of " + ", ".join(SORTS)),
                  order: Literal["asc", "desc"] = "desc", withdrawn: bool = False):
    """The registry: search words, filters, sort (``gap``: the bias probe's NRMSE gap)."""
    rows = filter_rows(registry_rows(db), q=q, decision=decision, trace=trace,
                       uploader=uploader, sort=sort if sort in SORTS else "updated",
                       descending=order != "asc", withdrawn=withdrawn)
    return {"datasets": [_row_json(r) for r in rows]}


def _dataset_json(db, ds, settings=None) -> dict[str, Any]:  # noqa: ANN001
    rep = service.get_current_report(db, ds.id)
    cur = service.current_decision(db, ds)
    queue = queue_health(settings, db).to_json() if settings is not None else None
    return {
        "id": ds.id, "name": ds.name, "source": ds.source, "licence": ds.licence,
        "description": ds.description, "intended_use": ds.intended_use,
        "uploader": ds.uploader.name, "created_at": ds.created_at.isoformat() + "Z",
        "withdrawn_at": ds.withdrawn_at.isoformat() + "Z" if ds.withdrawn_at else None,
        "withdrawn_reason": ds.withdrawn_reason or "",
        "files": [{"id": f.id, "name": f.relative_name, "sha256": f.file.sha256,
                   "size": f.file.size, "format": f.file.format} for f in ds.files],
        "job": job_status(service.latest_job(db, ds.id), queue),
        "report_id": rep.id if rep else None,
        "verdict": rep.verdict if rep else None,
        "decision": decision_json(cur) if cur else None,
    }


@router.get("/datasets/{dataset_id}", response_model=DatasetOut)
def get_dataset(dataset_id: int, db: DbSession, settings: SettingsDep):
    """One dataset: metadata, files, latest job (with the queue's health while it waits),
    current report id and decision."""
    return _dataset_json(db, service.get_dataset(db, dataset_id), settings)


@router.patch("/datasets/{dataset_id}", response_model=DatasetOut,
              dependencies=[Depends(csrf_protect)])
def edit_dataset(dataset_id: int, payload: DatasetEditIn, db: DbSession, user: CurrentUser):
    """Correct metadata (uploader or admin); old values stay in the audit trail."""
    ds = service.get_dataset(db, dataset_id)
    service.edit_dataset(db, ds, user=user, changes=payload.model_dump())
    db.commit()
    return _dataset_json(db, ds)


@router.post("/datasets/{dataset_id}/withdraw", response_model=DatasetOut,
             dependencies=[Depends(csrf_protect)])
def withdraw_dataset(dataset_id: int, payload: WithdrawIn, db: DbSession, user: CurrentUser):
    """Withdraw a dataset (uploader or admin): hidden from the default registry view."""
    ds = service.get_dataset(db, dataset_id)
    service.withdraw_dataset(db, ds, user=user, reason=payload.reason)
    db.commit()
    return _dataset_json(db, ds)


@router.get("/datasets/{dataset_id}/report")
def get_report(dataset_id: int, db: DbSession) -> dict[str, Any]:
    """The current report (``rawproof.report/1``, shared/REPORT_CONTRACT.md) plus
    ``methods_statement``."""
    ds = service.get_dataset(db, dataset_id)
    rep = service.get_current_report(db, ds.id)
    if rep is None:
        raise NotFoundError("This dataset has no report yet.")
    return with_methods_statement(db, ds, rep.data)


@router.get("/datasets/{dataset_id}/reports", response_model=ReportListOut)
def list_reports(dataset_id: int, db: DbSession):
    """Every report of the dataset, newest first."""
    return {"reports": [
        {"id": r.id, "created_at": r.created_at.isoformat() + "Z",
         "tool_version": r.tool_version, "analyser_versions": r.analyser_versions,
         "verdict": r.verdict}
        for r in service.report_history(db, service.get_dataset(db, dataset_id).id)
    ]}


@router.get("/datasets/{dataset_id}/decisions", response_model=DecisionHistoryOut,
            response_model_by_alias=True)
def get_decisions(dataset_id: int, db: DbSession):
    """The current decision and its history (``rawproof.decisions/1``)."""
    return decisions_export(db, dataset_id)


@router.get("/datasets/{dataset_id}/comments", response_model=CommentListOut)
def get_comments(dataset_id: int, db: DbSession):
    ds = service.get_dataset(db, dataset_id)
    return {"comments": [
        {"id": c.id, "author": c.author.name, "body": c.body, "trace_id": c.trace_id,
         "created_at": c.created_at.isoformat() + "Z"}
        for c in service.list_comments(db, ds.id)
    ]}


@router.post("/datasets/{dataset_id}/comments", status_code=201, response_model=CreatedOut,
             dependencies=[Depends(csrf_protect)])
def post_comment(dataset_id: int, payload: CommentIn, db: DbSession, user: CurrentUser):
    """Add a plain-text comment, optionally about one trace."""
    ds = service.get_dataset(db, dataset_id)
    c = service.add_comment(db, dataset=ds, author=user, body=payload.body,
                            trace_id=payload.trace_id)
    db.commit()
    return {"id": c.id}


@router.post("/datasets/{dataset_id}/decisions", status_code=201, response_model=DecisionOut,
             dependencies=[Depends(csrf_protect)])
def post_decision(dataset_id: int, payload: DecisionIn, db: DbSession, user: CurrentUser):
    """Record a decision (not on your own dataset); 409 ``decision_conflict`` when the
    current decision is not ``expected_current_id`` (its body holds ``current``)."""
    from app.web.errors import error_body

    ds = service.get_dataset(db, dataset_id)
    try:
        d = service.record_decision(
            db, dataset=ds, reviewer=user, outcome=payload.outcome,
            rationale=payload.rationale, expected_current_id=payload.expected_current_id)
    except DecisionConflictError as exc:
        db.rollback()
        cur = service.current_decision(db, service.get_dataset(db, dataset_id))
        body = error_body("decision_conflict", exc.message)
        body["current"] = decision_json(cur) if cur else None
        return JSONResponse(status_code=409, content=body)
    db.commit()
    return decision_json(d)


@router.post("/datasets/{dataset_id}/reanalyse", status_code=202, response_model=JobOut,
             dependencies=[Depends(csrf_protect)])
def reanalyse(dataset_id: int, db: DbSession, user: CurrentUser):
    """Queue a new analysis with the current analysers."""
    job = service.request_reanalysis(db, service.get_dataset(db, dataset_id), user=user)
    db.commit()
    return job_status(job)


@router.post("/datasets/{dataset_id}/probe", status_code=202, response_model=ProbeOut,
             dependencies=[Depends(csrf_protect)])
def start_probe(dataset_id: int, payload: ProbeIn, db: DbSession, user: CurrentUser):
    """Queue the bias probe on the current report's support; poll ``GET .../probe``."""
    run = probe_jobs.request_probe(db, service.get_dataset(db, dataset_id), user=user,
                                   acceleration=payload.acceleration, family=payload.family,
                                   slices=payload.slices)
    db.commit()
    return probe_jobs.probe_json(run)


@router.get("/datasets/{dataset_id}/probe", response_model=ProbeOut)
def get_probe(dataset_id: int, db: DbSession):
    """The newest bias-probe run (``result`` holds ``rawproof.probe/1`` once done)."""
    run = probe_jobs.latest_probe(db, service.get_dataset(db, dataset_id).id)
    if run is None:
        raise NotFoundError("This dataset has not been probed.")
    return probe_jobs.probe_json(run)


_UPLOAD_BODY = {"requestBody": {"required": True, "content": {"multipart/form-data": {
    "schema": {"type": "object", "required": ["name", "source", "files"], "properties": {
        "name": {"type": "string"}, "source": {"type": "string"},
        "licence": {"type": "string"}, "description": {"type": "string"},
        "intended_use": {"type": "string"},
        "files": {"type": "array", "items": {"type": "string", "format": "binary"}}}}}}}}


@uploads_router.post("/uploads", status_code=201, response_model=UploadOut,
                     openapi_extra=_UPLOAD_BODY)
async def api_upload(request: Request, user: StreamingUser, settings: SettingsDep):
    """Register a dataset: multipart form with ``name``, ``source``, optional ``licence``,
    ``description``, ``intended_use``, then one or more ``files`` parts (streamed)."""
    return await upload(request, user, settings)
