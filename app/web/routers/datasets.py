"""A dataset's page: report, files, comments, decisions; its status, exports and downloads."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends, Request
from fastapi.responses import FileResponse, JSONResponse, RedirectResponse
from sqlalchemy.orm import Session

import app
from app.store import files as filestore
from app.store import service
from app.store.errors import NotFoundError
from app.store.models import OUTCOMES, DatasetFile, Job, Report, User
from app.web.deps import CurrentUser, DbSession, SettingsDep, csrf_protect, current_user
from app.web.pagecache import cached_page
from app.web.security import attachment_name
from app.web.templating import render

router = APIRouter(tags=["datasets"], dependencies=[Depends(current_user)])


def job_status(job: Job | None) -> dict[str, Any] | None:
    """A job as JSON for the live progress view and the API."""
    if job is None:
        return None
    return {
        "id": job.id, "state": job.state, "attempts": job.attempts, "error": job.error,
        "progress": job.progress, "report_id": job.report_id,
        "created_at": job.created_at.isoformat() + "Z",
        "finished_at": job.finished_at.isoformat() + "Z" if job.finished_at else None,
    }


def decision_json(d) -> dict[str, Any]:  # noqa: ANN001
    return {
        "id": d.id, "outcome": d.outcome, "outcome_label": d.outcome_label,
        "rationale": d.rationale, "reviewer": d.reviewer.name,
        "reviewer_label": d.reviewer.label, "created_at": d.created_at.isoformat() + "Z",
        "previous_id": d.previous_id,
    }


def decisions_export(db: Session, dataset_id: int) -> dict[str, Any]:
    ds = service.get_dataset(db, dataset_id)
    history = service.list_decisions(db, ds.id)
    return {
        "schema": "rawproof.decisions/1",
        "dataset": {"id": ds.id, "name": ds.name, "source": ds.source},
        "current": decision_json(history[0]) if history else None,
        "history": [decision_json(d) for d in history],
        "caution": app.CAUTION,
    }


def dataset_context(db: Session, settings, dataset_id: int, user: User,  # noqa: ANN001
                    report_id: int | None = None) -> dict[str, Any]:
    """Everything the dataset page shows."""
    ds = service.get_dataset(db, dataset_id)
    if report_id is None:
        report_row = service.get_current_report(db, ds.id)
    else:
        report_row = db.get(Report, report_id)
        if report_row is None or report_row.dataset_id != ds.id:
            raise NotFoundError(f"Dataset {ds.id} has no report {report_id}.")
    report = report_row.data if report_row else None
    job = service.latest_job(db, ds.id)
    current = service.current_decision(db, ds)
    history = service.report_history(db, ds.id)
    newest = history[0] if history else None
    outdated = newest is not None and newest.tool_version != app.__version__
    return {
        "dataset": ds,
        "report": report,
        "report_row": report_row,
        "is_current_report": report_row is not None and report_row is newest,
        "report_history": history,
        "outdated": outdated,
        "files": ds.files,
        "duplicates": service.duplicates_of(db, ds),
        "job": job,
        "job_json": job_status(job),
        "comments": service.list_comments(db, ds.id),
        "decisions": service.list_decisions(db, ds.id),
        "current_decision": current,
        "can_decide": user.id != ds.uploader_id,
        "trace_ids": list((report or {}).get("traces", {})),
        "outcomes": OUTCOMES,
        "previews_available": bool(report_row and
                                   filestore.previews_file(settings, report_row.id).exists()),
    }


@router.get("/datasets/{dataset_id}")
def dataset_page(request: Request, dataset_id: int, db: DbSession, user: CurrentUser,
                 settings: SettingsDep):
    return cached_page(request, db, lambda: render(
        request, "dataset.html", dataset_context(db, settings, dataset_id, user)))


@router.get("/datasets/{dataset_id}/reports/{report_id}")
def old_report_page(request: Request, dataset_id: int, report_id: int, db: DbSession,
                    user: CurrentUser, settings: SettingsDep):
    return render(request, "dataset.html",
                  dataset_context(db, settings, dataset_id, user, report_id=report_id))


@router.get("/datasets/{dataset_id}/status")
def dataset_status(dataset_id: int, db: DbSession):
    ds = service.get_dataset(db, dataset_id)
    rep = service.get_current_report(db, ds.id)
    return {"dataset_id": ds.id, "job": job_status(service.latest_job(db, ds.id)),
            "report_id": rep.id if rep else None}


def _json_download(obj: Any, filename: str) -> JSONResponse:
    return JSONResponse(obj, headers={
        "content-disposition": f'attachment; filename="{attachment_name(filename)}"'})


@router.get("/datasets/{dataset_id}/report.json")
def report_json(dataset_id: int, db: DbSession):
    ds = service.get_dataset(db, dataset_id)
    rep = service.get_current_report(db, ds.id)
    if rep is None:
        raise NotFoundError("This dataset has no report yet.")
    return _json_download(with_methods_statement(db, ds, rep.data),
                          f"rawproof-report-{ds.id}-{rep.id}.json")


def with_methods_statement(db: Session, ds, report: dict[str, Any]) -> dict[str, Any]:  # noqa: ANN001
    """The report contract plus the paste-ready methods paragraph (an added key).

    The paragraph is the one the page and ``methods.txt`` show
    (:func:`app.web.evidence.methods_for`).
    """
    from app.web.evidence import methods_for

    out = dict(report)
    out["methods_statement"] = methods_for(db, ds, report)
    return out


@router.get("/datasets/{dataset_id}/reports/{report_id}.json")
def old_report_json(dataset_id: int, report_id: int, db: DbSession):
    rep = db.get(Report, report_id)
    if rep is None or rep.dataset_id != dataset_id:
        raise NotFoundError(f"Dataset {dataset_id} has no report {report_id}.")
    return _json_download(rep.data, f"rawproof-report-{dataset_id}-{rep.id}.json")


@router.get("/datasets/{dataset_id}/decisions.json")
def decisions_json(dataset_id: int, db: DbSession):
    return _json_download(decisions_export(db, dataset_id),
                          f"rawproof-decisions-{dataset_id}.json")


@router.post("/datasets/{dataset_id}/reanalyse", dependencies=[Depends(csrf_protect)])
def reanalyse(dataset_id: int, db: DbSession, user: CurrentUser):
    ds = service.get_dataset(db, dataset_id)
    service.request_reanalysis(db, ds, user=user)
    db.commit()
    return RedirectResponse(f"/datasets/{ds.id}#analysis", status_code=303)


@router.get("/files/{link_id}/download")
def download_file(link_id: int, db: DbSession, settings: SettingsDep):
    link = db.get(DatasetFile, link_id)
    if link is None:
        raise NotFoundError("There is no such file.")
    path = filestore.blob_path(settings, link.file.sha256)
    if not path.exists():
        raise NotFoundError("The stored file is missing from the data folder.")
    return FileResponse(
        path, media_type="application/octet-stream",
        headers={"content-disposition":
                 f'attachment; filename="{attachment_name(link.relative_name)}"'},
    )
