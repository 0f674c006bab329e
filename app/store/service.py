"""The store's plain functions: what the web app, the worker and the demo loader call.

Every function takes an open SQLAlchemy session and leaves committing to the
caller (``with session_scope(settings) as s: ...``). Every change writes an
audit event in the same transaction.

One module per resource; this module re-exports them under one name
(``service.create_user``, ``service.record_decision``...):

- :mod:`app.store.audit`: the audit trail.
- :mod:`app.store.accounts`: members, passwords, web sessions, API tokens.
- :mod:`app.store.datasets`: datasets and their files.
- :mod:`app.store.analyses`: queueing analyses, stored reports.
- :mod:`app.store.reviews`: comments and decisions.

Running queued jobs is the worker's business (:func:`app.worker.run_inline`):
the store never imports the worker.
"""

from app.store.accounts import (
    MIN_PASSWORD,
    NAME_RE,
    authenticate,
    create_api_token,
    create_user,
    create_web_session,
    end_web_session,
    get_user,
    revoke_api_token,
    set_active,
    set_admin,
    set_password,
    user_for_api_token,
    web_session_for,
)
from app.store.analyses import (
    enqueue_job,
    get_current_report,
    latest_job,
    report_history,
    request_reanalysis,
    store_report,
)
from app.store.audit import audit
from app.store.datasets import (
    EDITABLE,
    MAX_FIELD,
    Duplicate,
    FileInput,
    create_dataset,
    duplicates_of,
    edit_dataset,
    edit_history,
    get_dataset,
    purge_files,
    restore_dataset,
    withdraw_dataset,
)
from app.store.reviews import (
    MAX_COMMENT,
    add_comment,
    current_decision,
    list_comments,
    list_decisions,
    record_decision,
)

__all__ = [
    "EDITABLE", "edit_dataset", "edit_history", "purge_files", "restore_dataset",
    "withdraw_dataset",
    "MAX_COMMENT", "MAX_FIELD", "MIN_PASSWORD", "NAME_RE", "Duplicate", "FileInput",
    "add_comment", "audit", "authenticate", "create_api_token", "create_dataset",
    "create_user", "create_web_session", "current_decision", "duplicates_of",
    "end_web_session", "enqueue_job", "get_current_report", "get_dataset", "get_user",
    "latest_job", "list_comments", "list_decisions", "record_decision", "report_history",
    "request_reanalysis", "revoke_api_token", "set_active", "set_admin", "set_password",
    "store_report", "user_for_api_token", "web_session_for",
]
