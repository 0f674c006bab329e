"""Comments and decisions from the dataset page's forms."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Form, Request
from fastapi.responses import RedirectResponse
from sqlalchemy.orm import Session

from app.store import service
from app.store.errors import DecisionConflictError, StoreError
from app.web.deps import CurrentUser, DbSession, SettingsDep, csrf_protect, current_user
from app.web.routers.datasets import dataset_context
from app.web.templating import render

router = APIRouter(tags=["reviews"],
                   dependencies=[Depends(current_user), Depends(csrf_protect)])


def _expected(raw: str) -> int | None:
    """The form's ``expected_current_id`` (empty: 0, no decision seen); else a row id."""
    from app.web.deps import parse_row_id

    return parse_row_id(raw, "expected_current_id", empty=0)


def _reader_after_failed_write(request: Request, db: Session):  # noqa: ANN202
    """End the request's write transaction and give a read session for the error page.

    The write session would take SQLite's write lock again at its next statement and
    hold it while the whole dataset page renders; closing it (which rolls back, and
    unlike ``rollback()`` keeps the signed-in member's loaded attributes readable)
    and reading the page's data on a read session keeps other writers moving.
    """
    db.close()
    return request.app.state.database.scope(write=False)


@router.post("/datasets/{dataset_id}/comments")
def post_comment(
    request: Request,
    dataset_id: int,
    db: DbSession,
    user: CurrentUser,
    settings: SettingsDep,
    body: Annotated[str, Form()] = "",
    trace_id: Annotated[str, Form()] = "",
):
    ds = service.get_dataset(db, dataset_id)
    try:
        comment = service.add_comment(db, dataset=ds, author=user, body=body,
                                      trace_id=trace_id or None)
    except StoreError as exc:
        with _reader_after_failed_write(request, db) as reader:
            ctx = dataset_context(reader, settings, dataset_id, user)
            ctx.update(comment_error=exc.message,
                       comment_form={"body": body, "trace_id": trace_id})
            return render(request, "dataset.html", ctx, status_code=exc.status_code)
    db.commit()
    return RedirectResponse(f"/datasets/{ds.id}#comment-{comment.id}", status_code=303)


@router.post("/datasets/{dataset_id}/decisions")
def post_decision(
    request: Request,
    dataset_id: int,
    db: DbSession,
    user: CurrentUser,
    settings: SettingsDep,
    outcome: Annotated[str, Form()] = "",
    rationale: Annotated[str, Form()] = "",
    expected_current_id: Annotated[str, Form()] = "",
):
    ds = service.get_dataset(db, dataset_id)
    try:
        service.record_decision(db, dataset=ds, reviewer=user, outcome=outcome,
                                rationale=rationale,
                                expected_current_id=_expected(expected_current_id))
    except StoreError as exc:
        with _reader_after_failed_write(request, db) as reader:
            ctx = dataset_context(reader, settings, dataset_id, user)
            ctx.update(decision_error=exc.message,
                       decision_conflict=isinstance(exc, DecisionConflictError),
                       decision_form={"outcome": outcome, "rationale": rationale})
            return render(request, "dataset.html", ctx, status_code=exc.status_code)
    db.commit()
    return RedirectResponse(f"/datasets/{ds.id}#decision", status_code=303)
