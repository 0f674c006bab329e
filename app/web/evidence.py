"""Routes and template helpers of the dataset page's evidence panel.

Figure PNGs rendered from a stored report's evidence, slice-viewer previews,
the effective-rate calculator (JSON and chart) and the methods statement. PNGs
are cached on disk under ``<data_dir>/reports/<report_id>/figures/``; a report
never changes once stored, so a cached file stays valid.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import JSONResponse, Response
from sqlalchemy.orm import Session

from app.config import Settings
from app.methods import methods_statement
from app.store import files as filestore
from app.store import service
from app.store.errors import NotFoundError, ValidationError
from app.store.models import Report
from app.web import figures
from app.web.deps import DbSession, SettingsDep, current_user
from app.web.templating import templates

router = APIRouter(tags=["evidence"], dependencies=[Depends(current_user)])

PNG_HEADERS = {"cache-control": "private, max-age=86400"}
PREVIEW_KINDS = ("images", "spectra")


# ---------------------------------------------------------------- helpers
def _report(db: Session, dataset_id: int, report_id: int) -> Report:
    row = db.get(Report, report_id)
    if row is None or row.dataset_id != dataset_id:
        raise NotFoundError(f"Dataset {dataset_id} has no report {report_id}.")
    return row


def _cache_dir(settings: Settings, report_id: int) -> Path:
    return settings.data_dir / "reports" / str(int(report_id)) / "figures"


def _write_atomic(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-", suffix=".png")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _cached_png(path: Path, make: Any) -> bytes | None:
    if path.is_file():
        return path.read_bytes()
    data = make()
    if data is not None:
        _write_atomic(path, data)
    return data


def _png(data: bytes) -> Response:
    return Response(content=data, media_type="image/png", headers=PNG_HEADERS)


def preview_index(settings: Settings, report_id: int) -> list[dict[str, Any]]:
    """Groups in a report's previews file: name, frame indices, and how many previews."""
    path = filestore.previews_file(settings, report_id)
    if not path.is_file():
        return []
    out = []
    with np.load(path, allow_pickle=False) as z:
        groups = [str(g) for g in z["groups"]] if "groups" in z.files else []
        for g, name in enumerate(groups):
            key = f"g{g}_images"
            n = int(z[key].shape[0]) if key in z.files and z[key].ndim == 3 else 0
            idx = z[f"g{g}_indices"].tolist() if f"g{g}_indices" in z.files else []
            if n:
                out.append({"group": g, "name": name, "n": n, "indices": idx[:n]})
    return out


def _preview_array(settings: Settings, report_id: int, group: int, kind: str, i: int
                   ) -> np.ndarray:
    path = filestore.previews_file(settings, report_id)
    if not path.is_file():
        raise NotFoundError("This report has no slice previews.")
    with np.load(path, allow_pickle=False) as z:
        key = f"g{int(group)}_{kind}"
        if key not in z.files or z[key].ndim != 3 or not 0 <= i < z[key].shape[0]:
            raise NotFoundError("There is no such preview.")
        return np.asarray(z[key][i])


# ---------------------------------------------------------------- effective rate
FAMILY_LABELS = {
    "random_1d": "1D random lines (variable density)",
    "equispaced_1d": "1D equispaced lines",
    "poisson_2d": "2D Poisson disc",
    "random_2d": "2D random points",
}
DIM_LABELS = {"cols": "along columns (k_x)", "rows": "along rows (k_y)",
              "rows,cols": "both in-plane axes"}
NOMINAL_GRID = (2.0, 3.0, 4.0, 6.0, 8.0, 10.0, 12.0)
MAX_ACCELERATION = 32.0


def measured_support(report: dict[str, Any]) -> dict[str, Any]:
    """The acquired k-space support per in-plane axis, from the report's evidence.

    Returns ``{"shape": (rows, cols), "rows": (lo, hi) | None, "cols": (lo, hi) | None}``
    with inclusive centred-order index ranges; ``None`` means the whole axis.
    Zero-filling edges and partial-Fourier edges are intersected.
    """
    shape = [int(v) for v in (report.get("input") or {}).get("shape") or []]
    if len(shape) < 2:
        raise ValidationError("The report does not say the image size.")
    rows, cols = shape[-2], shape[-1]
    traces = report.get("traces") or {}
    support: dict[str, Any] = {"shape": (rows, cols), "rows": None, "cols": None}
    for tid in ("zero_filling", "partial_fourier"):
        t = traces.get(tid) or {}
        if t.get("status") != "present":
            continue
        edges = (t.get("evidence") or {}).get("edges") or {}
        for axis, n in (("rows", rows), ("cols", cols)):
            e = edges.get(axis)
            if isinstance(e, list) and len(e) == 2 and all(isinstance(v, int) for v in e):
                lo, hi = max(0, e[0]), min(n - 1, e[1])
                if support[axis] is not None:
                    lo, hi = max(lo, support[axis][0]), min(hi, support[axis][1])
                if hi >= lo and (lo > 0 or hi < n - 1):
                    support[axis] = (lo, hi)
    return support


def _sampling() -> Any:
    import app.sampling as sampling

    return sampling


def _check_inputs(family: str, acceleration: float, dims: str) -> None:
    if family not in FAMILY_LABELS:
        raise ValidationError(f"Unknown mask family {family!r}; choose one of "
                              + ", ".join(FAMILY_LABELS) + ".")
    if dims not in DIM_LABELS:
        raise ValidationError("The undersampled axes are 'rows', 'cols' or 'rows,cols'.")
    if not (np.isfinite(acceleration) and 1.0 <= acceleration <= MAX_ACCELERATION):
        raise ValidationError(f"The nominal acceleration must be between 1 and "
                              f"{MAX_ACCELERATION:g}.")


def effective_summary(report: dict[str, Any], *, family: str, acceleration: float,
                      dims: str, n_masks: int = 8, seed: int = 0) -> dict[str, Any]:
    """The calculator's answer: the effective rate on the measured support and on a raw grid."""
    _check_inputs(family, acceleration, dims)
    sampling = _sampling()
    sup = measured_support(report)
    ds = sampling.effective_rate(sup["shape"], sup, family, acceleration, dims=dims,
                                 n_masks=n_masks, seed=seed)
    raw = sampling.effective_rate(sup["shape"], {"shape": sup["shape"], "rows": None,
                                                 "cols": None},
                                  family, acceleration, dims=dims, n_masks=n_masks, seed=seed)
    return {"family": family, "dims": dims, "acceleration": float(acceleration),
            "effective_acceleration": float(ds["effective_acceleration"]),
            "raw_effective_acceleration": float(raw["effective_acceleration"]),
            "support": {"shape": list(sup["shape"]),
                        "rows": list(sup["rows"]) if sup["rows"] else None,
                        "cols": list(sup["cols"]) if sup["cols"] else None},
            "sampling": ds}


def curves_for_report(report: dict[str, Any], *, family: str, dims: str) -> dict[str, Any]:
    """Effective against nominal acceleration on the measured support and on a raw grid."""
    nominal, eff, raw = [], [], []
    for r in NOMINAL_GRID:
        res = effective_summary(report, family=family, acceleration=r, dims=dims, n_masks=4)
        nominal.append(r)
        eff.append(res["effective_acceleration"])
        raw.append(res["raw_effective_acceleration"])
    return {"nominal": nominal, "dataset": eff, "raw": raw, "family": family, "dims": dims}


def _support_text(sup: dict[str, Any]) -> str:
    parts = []
    for axis in ("rows", "cols"):
        n = sup["shape"][0 if axis == "rows" else 1]
        e = sup[axis]
        parts.append(f"{axis} {e[0]}-{e[1]} of {n}" if e else f"all {n} {axis}")
    return ", ".join(parts)


def calculator_options(report: dict[str, Any]) -> dict[str, Any] | None:
    """Form choices and the first answer for the panel; None without app.sampling."""
    try:
        _sampling()
    except ImportError:
        return None
    sup = measured_support(report)
    dims = "cols" if sup["cols"] or not sup["rows"] else "rows"
    default = {"family": "random_1d", "acceleration": 4.0, "dims": dims}
    try:
        first = effective_summary(report, **default)
        initial = {"nominal_text": f"{first['acceleration']:g}",
                   "effective_text": f"{first['effective_acceleration']:.2f}"}
    except (ValidationError, ValueError):
        initial = None
    return {"families": list(FAMILY_LABELS.items()), "dims": list(DIM_LABELS.items()),
            "default": default, "initial": initial, "support_text": _support_text(sup),
            "max_acceleration": MAX_ACCELERATION}


def default_effective(report: dict[str, Any]) -> dict[str, Any] | None:
    """The default calculator answer, for the methods statement (None if no support cut)."""
    sup = measured_support(report)
    if sup["rows"] is None and sup["cols"] is None:
        return None
    dims = "cols" if sup["cols"] else "rows"
    return effective_summary(report, family="random_1d", acceleration=4.0, dims=dims)


# ---------------------------------------------------------------- routes
@router.get("/datasets/{dataset_id}/reports/{report_id}/figures/{name}.png")
def figure_png(dataset_id: int, report_id: int, name: str, db: DbSession,
               settings: SettingsDep) -> Response:
    if name not in figures.FIGURES:
        raise NotFoundError(f"There is no figure called {name!r}.")
    row = _report(db, dataset_id, report_id)
    data = _cached_png(_cache_dir(settings, row.id) / f"{name}.png",
                       lambda: figures.render(name, row.data))
    if data is None:
        raise NotFoundError("This report holds no evidence for that figure.")
    return _png(data)


@router.get("/datasets/{dataset_id}/reports/{report_id}/previews/{group}/{kind}/{i}.png")
def preview_png(dataset_id: int, report_id: int, group: int, kind: str, i: int,
                db: DbSession, settings: SettingsDep) -> Response:
    if kind not in PREVIEW_KINDS:
        raise NotFoundError("A preview is 'images' or 'spectra'.")
    row = _report(db, dataset_id, report_id)
    path = _cache_dir(settings, row.id) / f"preview-{int(group)}-{kind}-{int(i)}.png"
    data = _cached_png(path, lambda: figures.preview_png(
        _preview_array(settings, row.id, group, kind, i)))
    return _png(data)


def _current(db: Session, dataset_id: int) -> dict[str, Any]:
    ds = service.get_dataset(db, dataset_id)
    rep = service.get_current_report(db, ds.id)
    if rep is None:
        raise NotFoundError("This dataset has no report yet.")
    return rep.data


@router.get("/datasets/{dataset_id}/effective-rate")
def effective_rate_json(dataset_id: int, db: DbSession,
                        family: str = Query("random_1d", max_length=40),
                        acceleration: float = Query(4.0),
                        dims: str = Query("cols", max_length=20)) -> JSONResponse:
    report = _current(db, dataset_id)
    result = effective_summary(report, family=family, acceleration=acceleration, dims=dims)
    return JSONResponse(result)


@router.get("/datasets/{dataset_id}/effective-rate.png")
def effective_rate_png(dataset_id: int, db: DbSession,
                       family: str = Query("random_1d", max_length=40),
                       dims: str = Query("cols", max_length=20),
                       acceleration: float = Query(4.0)) -> Response:
    report = _current(db, dataset_id)
    _check_inputs(family, acceleration, dims)
    curves = curves_for_report(report, family=family, dims=dims)
    fig = figures.build_effective_curve(curves, marker=acceleration)
    return Response(content=figures.to_png(fig), media_type="image/png",
                    headers={"cache-control": "private, max-age=600"})


@router.get("/datasets/{dataset_id}/methods.txt")
def methods_txt(dataset_id: int, db: DbSession) -> Response:
    ds = service.get_dataset(db, dataset_id)
    report = _current(db, dataset_id)
    return Response(content=methods_for(db, ds, report) + "\n",
                    media_type="text/plain; charset=utf-8")


def methods_for(db: Session, dataset: Any, report: dict[str, Any] | None) -> str:
    """The methods statement with the current decision and the default effective rate."""
    if not report:
        return ""
    dec = service.current_decision(db, dataset)
    decision = {"outcome": dec.outcome, "rationale": dec.rationale} if dec else None
    try:
        eff = default_effective(report)
    except (ValidationError, ImportError, ValueError):
        eff = None
    return methods_statement(report, decision, effective=eff)


# ---------------------------------------------------------------- template helper
def evidence_for(request: Request, dataset: Any, report: dict[str, Any] | None,
                 report_row: Any) -> dict[str, Any]:
    """What templates/evidence/panel.html shows (called from the template)."""
    if not report or report_row is None:
        return {"ready": False}
    settings: Settings = request.app.state.settings
    base = f"/datasets/{dataset.id}/reports/{report_row.id}"
    figs = [{"name": s.name, "title": s.title, "caption": s.caption,
             "traces": list(s.trace_ids), "url": f"{base}/figures/{s.name}.png"}
            for s in figures.available(report)]
    for f in figs:
        f["statuses"] = {t: (report.get("traces", {}).get(t) or {}).get("status")
                         for t in f["traces"] if t in report.get("traces", {})}
    try:
        calc = calculator_options(report)
    except ValidationError:
        calc = None
    with request.app.state.database.scope(write=False) as s:
        methods = methods_for(s, service.get_dataset(s, dataset.id), report)
    return {
        "ready": True,
        "base": base,
        "figures": figs,
        "previews": preview_index(settings, report_row.id),
        "calculator": calc,
        "methods": methods,
        "dataset_id": dataset.id,
    }


templates.env.globals["evidence_for"] = evidence_for
