"""Datasets: creating one from uploaded files, finding one, files shared with others."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.config import Settings
from app.io.formats import format_label
from app.store import files as filestore
from app.store.analyses import enqueue_job
from app.store.audit import audit
from app.store.errors import NotFoundError, PermissionDeniedError, ValidationError
from app.store.models import AuditEvent, Dataset, DatasetFile, Decision, StoredFile, User, utcnow

MAX_FIELD = 5_000


FileInput = tuple[str, "Path | bytes | filestore.StoredBlob"]


def clean_field(value: str | None, field: str, *, required: bool = False,
                limit: int = MAX_FIELD) -> str:
    """``value`` stripped; refused when required and empty, or longer than ``limit``."""
    text = (value or "").strip()
    if required and not text:
        raise ValidationError(f"The {field} is required.")
    if len(text) > limit:
        raise ValidationError(f"The {field} is longer than {limit} characters.")
    return text


def _file_row(session: Session, blob: filestore.StoredBlob, name: str) -> StoredFile:
    row = session.scalar(select(StoredFile).where(StoredFile.sha256 == blob.sha256))
    if row is None:
        row = StoredFile(sha256=blob.sha256, size=blob.size, format=format_label(name))
        session.add(row)
        session.flush()
    return row


def create_dataset(
    session: Session,
    settings: Settings,
    *,
    uploader: User,
    name: str,
    source: str,
    licence: str,
    description: str,
    intended_use: str,
    files: list[FileInput],
) -> Dataset:
    """Register a candidate dataset, store its files content-addressed and queue its analysis.

    Parameters
    ----------
    files : list of (relative_name, content)
        ``content`` is a Path to copy, bytes, or a blob already in the store
        (:class:`app.store.files.StoredBlob`, as the streaming upload makes).
        Names are sanitised; two files may not end up with the same name.

    Raises
    ------
    ValidationError
        For a missing name or source, no files, or clashing file names.
    """
    ds = Dataset(
        name=clean_field(name, "dataset name", required=True, limit=300),
        source=clean_field(source, "source (citation or URL)", required=True),
        licence=clean_field(licence, "licence", limit=300),
        description=clean_field(description, "description"),
        intended_use=clean_field(intended_use, "intended use"),
        uploader_id=uploader.id,
    )
    if not files:
        raise ValidationError("A dataset needs at least one file.")
    seen: set[str] = set()
    links = []
    for rel, content in files:
        rel_name = filestore.sanitise_relative_name(rel)
        if rel_name in seen:
            raise ValidationError(f"Two files are both named {rel_name!r}.")
        seen.add(rel_name)
        if isinstance(content, filestore.StoredBlob):
            blob = content
        elif isinstance(content, bytes | bytearray):
            blob = filestore.store_bytes(settings, bytes(content))
        else:
            blob = filestore.store_path(settings, Path(content))
        links.append((rel_name, _file_row(session, blob, rel_name)))
    ds.total_size = sum(f.size for _, f in links)
    session.add(ds)
    session.flush()
    for rel_name, frow in links:
        session.add(DatasetFile(dataset_id=ds.id, file_id=frow.id, relative_name=rel_name))
    session.flush()
    audit(session, "dataset.create", actor=uploader, dataset_id=ds.id, name=ds.name,
          n_files=len(links), size=ds.total_size)
    enqueue_job(session, ds, requested_by=uploader)
    return ds


def get_dataset(session: Session, dataset_id: int) -> Dataset:
    ds = session.get(Dataset, dataset_id)
    if ds is None:
        raise NotFoundError(f"There is no dataset {dataset_id}.")
    return ds


@dataclass
class Duplicate:
    """Another dataset that holds some of this dataset's files (the same bytes)."""

    other_dataset_id: int
    other_dataset_name: str
    #: (this dataset's name for the file, the other dataset's name for it)
    files: list[tuple[str, str]]
    #: the other dataset's current decision outcome key, or None when undecided
    other_decision: str | None = None
    other_withdrawn: bool = False

    @property
    def relative_name(self) -> str:
        return self.files[0][0]


def duplicates_of(session: Session, dataset: Dataset) -> list[Duplicate]:
    """The other datasets that hold files of ``dataset``, with their decisions.

    A dataset is never its own duplicate (two names for one content inside one
    dataset are not listed); each other dataset appears once with all the shared files.
    """
    mine = {}
    for df in dataset.files:
        mine.setdefault(df.file_id, df.relative_name)
    if not mine:
        return []
    rows = session.execute(
        select(DatasetFile.file_id, DatasetFile.relative_name, Dataset.id, Dataset.name,
               Dataset.withdrawn_at, Decision.outcome)
        .join(Dataset, Dataset.id == DatasetFile.dataset_id)
        .outerjoin(Decision, Decision.id == Dataset.current_decision_id)
        .where(DatasetFile.file_id.in_(mine), DatasetFile.dataset_id != dataset.id)
        .order_by(Dataset.id, DatasetFile.relative_name)
    ).all()
    out: dict[int, Duplicate] = {}
    for file_id, rel, ds_id, name, withdrawn, outcome in rows:
        d = out.setdefault(ds_id, Duplicate(ds_id, name, [], outcome, withdrawn is not None))
        d.files.append((mine[file_id], rel))
    return list(out.values())


#: The metadata fields a dataset's uploader or an admin may correct, with their limits.
EDITABLE: dict[str, tuple[str, bool, int]] = {
    "name": ("dataset name", True, 300),
    "source": ("source (citation or URL)", True, MAX_FIELD),
    "licence": ("licence", False, 300),
    "description": ("description", False, MAX_FIELD),
    "intended_use": ("intended use", False, MAX_FIELD),
}


def _may_change(dataset: Dataset, user: User) -> None:
    if not (user.is_admin or user.id == dataset.uploader_id):
        raise PermissionDeniedError("Only the member who registered this dataset or a lab "
                                    "admin may change it.")


def edit_dataset(session: Session, dataset: Dataset, *, user: User,
                 changes: dict[str, str | None]) -> dict[str, list[str]]:
    """Correct a dataset's metadata; the old and new values go to the audit trail.

    Parameters
    ----------
    changes : dict
        Field -> new value for fields of :data:`EDITABLE`; None leaves a field alone.

    Returns
    -------
    dict
        Field -> ``[old, new]`` for the fields that changed (empty when none did).

    Raises
    ------
    PermissionDeniedError
        Unless ``user`` registered the dataset or is an admin.
    ValidationError
        For an unknown field, an emptied required field or a value too long.
    """
    _may_change(dataset, user)
    changed: dict[str, list[str]] = {}
    for key, value in changes.items():
        if key not in EDITABLE:
            raise ValidationError(f"{key!r} cannot be edited; the fields are "
                                  + ", ".join(EDITABLE) + ".")
        if value is None:
            continue
        label, required, limit = EDITABLE[key]
        new = clean_field(value, label, required=required, limit=limit)
        old = getattr(dataset, key) or ""
        if new != old:
            changed[key] = [old, new]
            setattr(dataset, key, new)
    if changed:
        dataset.updated_at = utcnow()
        audit(session, "dataset.edit", actor=user, dataset_id=dataset.id, changes=changed)
    return changed


def withdraw_dataset(session: Session, dataset: Dataset, *, user: User, reason: str) -> None:
    """Withdraw a dataset: hidden from the default registry view, kept for the record."""
    _may_change(dataset, user)
    if dataset.withdrawn_at is not None:
        raise ValidationError("This dataset is already withdrawn.")
    dataset.withdrawn_reason = clean_field(reason, "reason for withdrawing", required=True,
                                           limit=2000)
    dataset.withdrawn_at = dataset.updated_at = utcnow()
    audit(session, "dataset.withdraw", actor=user, dataset_id=dataset.id,
          reason=dataset.withdrawn_reason)


def restore_dataset(session: Session, dataset: Dataset, *, user: User) -> None:
    """Bring a withdrawn dataset back to the registry (not once its files were purged)."""
    _may_change(dataset, user)
    if dataset.withdrawn_at is None:
        raise ValidationError("This dataset is not withdrawn.")
    if dataset.files_purged_at is not None:
        raise ValidationError("This dataset's files were purged; register the files again.")
    dataset.withdrawn_at = None
    dataset.updated_at = utcnow()
    audit(session, "dataset.restore", actor=user, dataset_id=dataset.id)


def purge_files(session: Session, settings: Settings, dataset: Dataset, *, user: User,
                confirm_name: str) -> int:
    """Delete a withdrawn dataset's stored files (admin only; typed name as confirmation).

    A file whose bytes another dataset also holds is kept for that dataset. The
    dataset's row, reports, comments and decisions stay for the record.

    Returns
    -------
    int
        The number of stored files deleted from the data folder.
    """
    if not user.is_admin:
        raise PermissionDeniedError("Only a lab admin may purge a dataset's files.")
    if dataset.withdrawn_at is None:
        raise ValidationError("Withdraw the dataset before purging its files.")
    if dataset.files_purged_at is not None:
        raise ValidationError("This dataset's files were already purged.")
    if (confirm_name or "").strip() != dataset.name:
        raise ValidationError("Type the dataset's name exactly to confirm the purge.")
    removed = 0
    names = []
    for link in list(dataset.files):
        names.append(link.relative_name)
        shared = session.scalar(select(DatasetFile.id).where(
            DatasetFile.file_id == link.file_id, DatasetFile.dataset_id != dataset.id).limit(1))
        sha = link.file.sha256
        others_here = sum(1 for x in dataset.files if x.file_id == link.file_id) > 1
        session.delete(link)
        if shared is None and not others_here:
            path = filestore.blob_path(settings, sha)
            if path.exists():
                path.unlink()
                removed += 1
            session.delete(link.file)
        session.flush()
    dataset.files_purged_at = dataset.updated_at = utcnow()
    audit(session, "dataset.purge", actor=user, dataset_id=dataset.id, files=names,
          removed=removed)
    return removed


def edit_history(session: Session, dataset_id: int) -> list[AuditEvent]:
    """The dataset's metadata edits, withdrawals, restores and purges, newest first."""
    return list(session.scalars(
        select(AuditEvent)
        .where(AuditEvent.dataset_id == dataset_id,
               AuditEvent.action.in_(("dataset.edit", "dataset.withdraw", "dataset.restore",
                                      "dataset.purge")))
        .order_by(AuditEvent.id.desc())))
