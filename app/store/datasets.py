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
from app.store.errors import NotFoundError, ValidationError
from app.store.models import Dataset, DatasetFile, StoredFile, User

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
    """A file of this dataset whose bytes another dataset already holds."""

    relative_name: str
    other_dataset_id: int
    other_dataset_name: str
    other_relative_name: str


def duplicates_of(session: Session, dataset: Dataset) -> list[Duplicate]:
    """Files of ``dataset`` that are stored once but also belong to other datasets."""
    mine = {df.file_id: df.relative_name for df in dataset.files}
    if not mine:
        return []
    rows = session.execute(
        select(DatasetFile, Dataset)
        .join(Dataset, Dataset.id == DatasetFile.dataset_id)
        .where(DatasetFile.file_id.in_(mine), DatasetFile.dataset_id != dataset.id)
        .order_by(Dataset.id)
    ).all()
    return [Duplicate(mine[df.file_id], ds.id, ds.name, df.relative_name) for df, ds in rows]
