"""The support-cropped k-space export of a dataset (page link and API).

``GET /datasets/{id}/crop.npz`` (or ``crop.h5``), and the same under ``/api``, return
a zip holding ``rawproof-crop-{id}.npz|.h5`` (array or dataset ``kspace``) and its
``rawproof.crop/1`` JSON sidecar (:mod:`app.crop`). The crop rests on the dataset's
current stored report (its first group's ``zero_filling`` and ``partial_fourier``
traces), so nothing is re-analysed; the FFTs are done in :mod:`app.crop`, below
the web layer, while the request waits.
"""

from __future__ import annotations

import shutil
import tempfile
import zipfile
from pathlib import Path

from fastapi import APIRouter, Depends
from fastapi.responses import FileResponse
from starlette.background import BackgroundTask

from app import crop
from app.store import files as filestore
from app.store import service
from app.store.errors import NotFoundError
from app.web.deps import DbSession, SettingsDep, current_user
from app.web.security import attachment_name

router = APIRouter(tags=["exports"], dependencies=[Depends(current_user)])
_FORMATS = {"npz": "npz", "h5": "hdf5"}


def _export(dataset_id: int, fmt: str, db, settings) -> FileResponse:  # noqa: ANN001
    if fmt not in _FORMATS:
        raise NotFoundError("The export is crop.npz or crop.h5.")
    ds = service.get_dataset(db, dataset_id)
    rep = service.get_current_report(db, ds.id)
    if rep is None:
        raise NotFoundError("This dataset has no report yet: the crop rests on its measured "
                            "support.")
    report = rep.data
    groups = report.get("groups") or []
    traces = (groups[0].get("traces") if len(groups) > 1 else report.get("traces")) or {}
    work = Path(tempfile.mkdtemp(prefix=f"crop-{ds.id}-", dir=filestore.tmp_dir(settings)))
    try:
        items = [(df.relative_name, df.file.sha256) for df in ds.files]
        source = filestore.assemble_folder(settings, items, work / "files")
        stem = f"rawproof-crop-{ds.id}"
        meta = crop.export_path(str(source), work / "out" / f"{stem}.{fmt}",
                                fmt=_FORMATS[fmt], traces=traces)
        archive = work / f"{stem}-{fmt}.zip"
        with zipfile.ZipFile(archive, "w", compression=zipfile.ZIP_STORED) as zf:
            for f in meta["files"]:
                zf.write(f, arcname=Path(f).name)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    return FileResponse(
        archive, media_type="application/zip",
        headers={"content-disposition":
                 f'attachment; filename="{attachment_name(archive.name)}"'},
        background=BackgroundTask(shutil.rmtree, work, ignore_errors=True),
    )


@router.get("/datasets/{dataset_id}/crop.{fmt}")
def crop_download(dataset_id: int, fmt: str, db: DbSession, settings: SettingsDep):
    return _export(dataset_id, fmt, db, settings)


@router.get("/api/datasets/{dataset_id}/crop.{fmt}")
def crop_download_api(dataset_id: int, fmt: str, db: DbSession, settings: SettingsDep):
    return _export(dataset_id, fmt, db, settings)
