"""The home page: the lab's registry of datasets with search, filters and sorting."""

from __future__ import annotations

from urllib.parse import urlencode

from fastapi import APIRouter, Depends, Request
from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store.models import OUTCOMES, User
from app.store.queue_health import queue_health
from app.store.registry import SORTS, filter_rows, registry_rows
from app.web.deps import DbSession, SettingsDep, current_user
from app.web.labels import TRACE_LABELS
from app.web.pagecache import cached_page
from app.web.templating import render

#: The sort choices in plain words.
SORT_LABELS = {"updated": "last change", "created": "registered", "name": "name",
               "size": "size", "decision": "decision", "uploader": "uploader",
               "gap": "probe gap (naive use flatters by)"}

#: Rows per registry page: the whole lab's list renders in one page up to this size.
PAGE_SIZE = 100

router = APIRouter(tags=["registry"], dependencies=[Depends(current_user)])


@router.get("/")
def home(
    request: Request,
    db: DbSession,
    settings: SettingsDep,
    q: str = "",
    decision: str = "",
    trace: str = "",
    uploader: str = "",
    sort: str = "updated",
    order: str = "desc",
    page: int = 1,
    withdrawn: str = "",
):
    queue = queue_health(settings, db)
    return cached_page(request, db, lambda: _home(request, db, q, decision, trace, uploader,
                                                  sort, order, page, withdrawn == "1", queue),
                       extra_key=queue.key)


def _home(request: Request, db: Session, q: str, decision: str, trace: str, uploader: str,
          sort: str, order: str, page: int, show_withdrawn: bool = False, queue=None):  # noqa: ANN001
    all_rows = registry_rows(db)
    rows = filter_rows(all_rows, q=q, decision=decision if decision in (*OUTCOMES, "none") else "",
                       trace=trace, uploader=uploader,
                       sort=sort if sort in SORTS else "updated", descending=order != "asc",
                       withdrawn=show_withdrawn)
    n_withdrawn = sum(1 for r in all_rows if r.withdrawn)
    n_matching = len(rows)
    n_pages = max(1, -(-n_matching // PAGE_SIZE))
    page = min(max(1, page), n_pages)
    rows = rows[(page - 1) * PAGE_SIZE:page * PAGE_SIZE]
    trace_ids = sorted({t for r in all_rows for t in r.traces} | set(TRACE_LABELS))
    uploaders = list(db.scalars(select(User).order_by(User.name)))
    return render(request, "registry.html", {
        "queue": queue,
        "rows": rows, "n_total": len(all_rows) - (0 if show_withdrawn else n_withdrawn),
        "q": q, "decision": decision, "trace": trace,
        "uploader": uploader, "sort": sort, "order": order,
        "sorts": [(k, SORT_LABELS.get(k, k)) for k in SORTS],
        "show_withdrawn": show_withdrawn, "n_withdrawn": n_withdrawn,
        "trace_ids": trace_ids, "uploaders": uploaders,
        "filtered": bool(q or decision or trace or uploader or show_withdrawn),
        "page": page, "n_pages": n_pages, "n_matching": n_matching,
        "first_index": (page - 1) * PAGE_SIZE + 1,
        "page_query": urlencode({k: v for k, v in (("q", q), ("decision", decision),
                                 ("trace", trace), ("uploader", uploader), ("sort", sort),
                                 ("order", order),
                                 ("withdrawn", "1" if show_withdrawn else "")) if v}),
    })
