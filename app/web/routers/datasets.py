"""A dataset's page: report, files, comments, decisions; its status, exports and downloads."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import FileResponse, JSONResponse, RedirectResponse
from sqlalchemy.orm import Session

import app
from app import probe_jobs
from app.methods import CONFIDENCE_MEANING, finding_text, plain_answer
from app.store import files as filestore
from app.store import service
from app.store.errors import NotFoundError, StoreError
from app.store.models import OUTCOMES, DatasetFile, Job, Report, User
from app.store.queue_health import queue_health
from app.web.deps import CurrentUser, DbSession, SettingsDep, csrf_protect, current_user
from app.web.pagecache import cached_page
from app.web.security import attachment_name
from app.web.templating import render

router = APIRouter(tags=["datasets"], dependencies=[Depends(current_user)])


def job_status(job: Job | None, queue: dict[str, Any] | None = None) -> dict[str, Any] | None:
    """A job as JSON for the live progress view and the API.

    ``queue`` (:meth:`app.store.queue_health.QueueHealth.to_json`) is attached to a
    job that waits (queued or running), so a client polling it learns why it waits.
    """
    if job is None:
        return None
    out = {
        "id": job.id, "state": job.state, "attempts": job.attempts, "error": job.error,
        "progress": job.progress, "report_id": job.report_id,
        "created_at": job.created_at.isoformat() + "Z",
        "finished_at": job.finished_at.isoformat() + "Z" if job.finished_at else None,
    }
    if queue is not None and job.state in ("queued", "running"):
        out["queue"] = queue
    return out


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
    probe_run = probe_jobs.latest_probe(db, ds.id)
    probe_result = probe_jobs.latest_result(db, ds.id)
    answer = None
    if report:
        from app.web.evidence import safe_default_effective

        answer = plain_answer(report, effective=safe_default_effective(report),
                              probe=probe_result)
    shape = [int(n) for n in ((report or {}).get("input") or {}).get("shape") or []]
    queue = queue_health(settings, db)
    return {
        "queue": queue,
        "dataset": ds,
        "report": report,
        "report_row": report_row,
        "is_current_report": report_row is not None and report_row is newest,
        "report_history": history,
        "outdated": outdated,
        "files": ds.files,
        "duplicates": service.duplicates_of(db, ds),
        "job": job,
        "job_json": job_status(job, queue.to_json()),
        "comments": service.list_comments(db, ds.id),
        "decisions": service.list_decisions(db, ds.id),
        "current_decision": current,
        "can_decide": user.id != ds.uploader_id,
        "trace_ids": list((report or {}).get("traces", {})),
        "answer": answer,
        "findings": {tid: finding_text(tid, t, shape)
                     for tid, t in ((report or {}).get("traces") or {}).items()},
        "confidence_meaning": CONFIDENCE_MEANING,
        "probe_run": probe_run,
        "probe_json": probe_jobs.probe_json(probe_run),
        "probe_result": probe_result,
        "probe_choices": {"families": probe_jobs.FAMILIES,
                          "accelerations": probe_jobs.ACCELERATIONS,
                          "max_slices": probe_jobs.MAX_SLICES},
        "can_change": user.is_admin or user.id == ds.uploader_id,
        "is_admin": user.is_admin,
        "edit_history": service.edit_history(db, ds.id),
        "outcomes": OUTCOMES,
        "previews_available": bool(report_row and
                                   filestore.previews_file(settings, report_row.id).exists()),
    }


@router.get("/datasets/{dataset_id}")
def dataset_page(request: Request, dataset_id: int, db: DbSession, user: CurrentUser,
                 settings: SettingsDep):
    return cached_page(request, db, lambda: render(
        request, "dataset.html", dataset_context(db, settings, dataset_id, user)),
        extra_key=queue_health(settings, db).key)


# ":int" so that ".../reports/7.json" reaches old_report_json below (issue 21, finding 9).
@router.get("/datasets/{dataset_id}/reports/{report_id:int}")
def old_report_page(request: Request, dataset_id: int, report_id: int, db: DbSession,
                    user: CurrentUser, settings: SettingsDep):
    return render(request, "dataset.html",
                  dataset_context(db, settings, dataset_id, user, report_id=report_id))


@router.get("/datasets/{dataset_id}/status")
def dataset_status(dataset_id: int, db: DbSession, settings: SettingsDep):
    ds = service.get_dataset(db, dataset_id)
    rep = service.get_current_report(db, ds.id)
    queue = queue_health(settings, db).to_json()
    return {"dataset_id": ds.id, "job": job_status(service.latest_job(db, ds.id), queue),
            "queue": queue,
            "report_id": rep.id if rep else None,
            "probe": probe_jobs.probe_json(probe_jobs.latest_probe(db, ds.id))}


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


# ------------------------------------------------------------------ changes from the page
def _page_with_error(request: Request, db: Session, settings, dataset_id: int,  # noqa: ANN001
                     user: User, exc: StoreError, **extra: Any):
    db.close()
    with request.app.state.database.scope(write=False) as reader:
        ctx = dataset_context(reader, settings, dataset_id, user)
        ctx.update(extra)
        return render(request, "dataset.html", ctx, status_code=exc.status_code)


@router.post("/datasets/{dataset_id}/probe", dependencies=[Depends(csrf_protect)])
def start_probe(request: Request, dataset_id: int, db: DbSession, user: CurrentUser,
                settings: SettingsDep, acceleration: Annotated[str, Form()] = "4",
                family: Annotated[str, Form()] = "polynomial",
                slices: Annotated[str, Form()] = "8"):
    """Queue the bias probe; the worker runs it and the page shows its progress."""
    ds = service.get_dataset(db, dataset_id)
    try:
        probe_jobs.request_probe(db, ds, user=user, acceleration=acceleration, family=family,
                                 slices=slices)
    except StoreError as exc:
        return _page_with_error(request, db, settings, dataset_id, user, exc,
                                probe_error=exc.message)
    db.commit()
    return RedirectResponse(f"/datasets/{ds.id}#probe", status_code=303)


@router.post("/datasets/{dataset_id}/edit", dependencies=[Depends(csrf_protect)])
def edit_dataset(request: Request, dataset_id: int, db: DbSession, user: CurrentUser,
                 settings: SettingsDep, name: Annotated[str, Form()] = "",
                 source: Annotated[str, Form()] = "", licence: Annotated[str, Form()] = "",
                 description: Annotated[str, Form()] = "",
                 intended_use: Annotated[str, Form()] = ""):
    ds = service.get_dataset(db, dataset_id)
    form = {"name": name, "source": source, "licence": licence, "description": description,
            "intended_use": intended_use}
    try:
        service.edit_dataset(db, ds, user=user, changes=form)
    except StoreError as exc:
        return _page_with_error(request, db, settings, dataset_id, user, exc,
                                edit_error=exc.message, edit_form=form)
    db.commit()
    return RedirectResponse(f"/datasets/{ds.id}#about", status_code=303)


@router.post("/datasets/{dataset_id}/withdraw", dependencies=[Depends(csrf_protect)])
def withdraw_dataset(request: Request, dataset_id: int, db: DbSession, user: CurrentUser,
                     settings: SettingsDep, reason: Annotated[str, Form()] = ""):
    ds = service.get_dataset(db, dataset_id)
    try:
        service.withdraw_dataset(db, ds, user=user, reason=reason)
    except StoreError as exc:
        return _page_with_error(request, db, settings, dataset_id, user, exc,
                                withdraw_error=exc.message)
    db.commit()
    return RedirectResponse(f"/datasets/{ds.id}", status_code=303)


@router.post("/datasets/{dataset_id}/restore", dependencies=[Depends(csrf_protect)])
def restore_dataset(request: Request, dataset_id: int, db: DbSession, user: CurrentUser,
                    settings: SettingsDep):
    ds = service.get_dataset(db, dataset_id)
    try:
        service.restore_dataset(db, ds, user=user)
    except StoreError as exc:
        return _page_with_error(request, db, settings, dataset_id, user, exc,
                                withdraw_error=exc.message)
    db.commit()
    return RedirectResponse(f"/datasets/{ds.id}", status_code=303)


@router.post("/datasets/{dataset_id}/purge", dependencies=[Depends(csrf_protect)])
def purge_dataset_files(request: Request, dataset_id: int, db: DbSession, user: CurrentUser,
                        settings: SettingsDep, confirm_name: Annotated[str, Form()] = ""):
    """Delete a withdrawn dataset's stored files (admin; the typed name confirms)."""
    ds = service.get_dataset(db, dataset_id)
    try:
        service.purge_files(db, settings, ds, user=user, confirm_name=confirm_name)
    except StoreError as exc:
        return _page_with_error(request, db, settings, dataset_id, user, exc,
                                withdraw_error=exc.message)
    db.commit()
    return RedirectResponse(f"/datasets/{ds.id}", status_code=303)
