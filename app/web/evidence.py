"""Routes and template helpers of the dataset page's evidence panel.

Figure PNGs rendered from a stored report's evidence, slice-viewer previews,
the effective-rate calculator (JSON and chart) and the methods statement. PNGs
are cached on disk under ``<data_dir>/reports/<report_id>/figures/``; a report
never changes once stored, so a cached file stays valid.
"""

from __future__ import annotations

import functools
import json
import os
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import JSONResponse, Response
from sqlalchemy.orm import Session

from app import sampling
from app.config import Settings
from app.errors import InputError
from app.methods import USUAL_ACCELERATION, methods_statement
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
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".tmp-", suffix=path.suffix)
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
    "polynomial": "Variable density, polynomial decay",
    "gaussian": "Variable density, Gaussian",
    "uniform": "Uniform random",
    "poisson": "Variable-density Poisson disc",
    "equispaced": "Equispaced with calibration region",
}
LAYOUT_LABELS = {
    "1-cols": "Lines: undersample the columns (k_x)",
    "1-rows": "Lines: undersample the rows (k_y)",
    "2-cols": "2D: undersample both in-plane axes",
}
NOMINAL_GRID = (2.0, 3.0, 4.0, 6.0, 8.0, 10.0, 12.0)
CALC_MASKS = 20  # as ``rawproof sampling`` (its default --n-masks), so the numbers agree
CALC_SEED = 0
MAX_ACCELERATION = 32.0


def measured_support(report: dict[str, Any]) -> dict[str, Any]:
    """Image shape and true support fractions from a report, as ``rawproof sampling`` reads them.

    :func:`app.sampling.support_from_report` is the one rule the page and the
    command share, so both give the same numbers for the same report.
    """
    try:
        sup = sampling.support_from_report(report)
    except InputError as exc:
        raise ValidationError(exc.message) from exc
    return {"shape": sup["shape"], "support": sup["support"]}


def _layout(dims: int, axis: str) -> tuple[int, str]:
    if dims not in (1, 2) or axis not in ("rows", "cols"):
        raise ValidationError("dims is 1 (lines) or 2 (2D points); axis is rows or cols.")
    return dims, axis


def _check_inputs(family: str, acceleration: float, dims: int, axis: str) -> None:
    if family not in FAMILY_LABELS:
        raise ValidationError(f"Unknown mask family {family!r}; choose one of "
                              + ", ".join(FAMILY_LABELS) + ".")
    _layout(dims, axis)
    if not (np.isfinite(acceleration) and 1.0 <= acceleration <= MAX_ACCELERATION):
        raise ValidationError(f"The nominal acceleration must be between 1 and "
                              f"{MAX_ACCELERATION:g}.")


@functools.lru_cache(maxsize=1024)
def _effective_rate_frozen(shape: tuple[int, int], support: tuple[float, float], family: str,
                           acceleration: float, dims: int, axis: str) -> str:
    res = sampling.effective_rate(shape, support, family, acceleration, dims=dims,
                                     axis=axis, n_masks=CALC_MASKS, seed=CALC_SEED)
    return json.dumps(res)


def _effective_rate(shape: tuple[int, int], support: tuple[float, float], family: str,
                    acceleration: float, dims: int, axis: str) -> dict[str, Any]:
    """``app.sampling.effective_rate`` with the calculator's masks and seed, memoised.

    The answer depends only on these arguments (the masks are seeded), and the
    dataset page asks for it on every view; a fresh copy is returned each time.
    """
    return json.loads(_effective_rate_frozen(shape, support, family, acceleration, dims, axis))


def effective_summary(report: dict[str, Any], *, family: str, acceleration: float,
                      dims: int = 1, axis: str = "cols") -> dict[str, Any]:
    """The calculator's answer: app.sampling's effective rate on the measured support,
    and on the full grid of a raw acquisition of the same size."""
    _check_inputs(family, acceleration, dims, axis)
    sup = measured_support(report)
    shape = tuple(int(n) for n in sup["shape"])
    res = _effective_rate(shape, tuple(float(f) for f in sup["support"]), family,
                          float(acceleration), int(dims), axis)
    raw = _effective_rate(shape, (1.0, 1.0), family, float(acceleration), int(dims), axis)
    return {"family": family, "dims": dims, "axis": axis if dims == 1 else None,
            "acceleration": float(acceleration),
            "effective_acceleration": float(res["effective_acceleration"]),
            "effective_acceleration_std": float(res["effective_acceleration_std"]),
            "raw_effective_acceleration": float(raw["effective_acceleration"]),
            "shape": sup["shape"], "support": sup["support"],
            "n_masks": CALC_MASKS, "seed": CALC_SEED, "result": res}


def curves_for_report(report: dict[str, Any], *, family: str, dims: int = 1,
                      axis: str = "cols") -> dict[str, Any]:
    """Effective against nominal acceleration on the measured support and on a raw grid."""
    _check_inputs(family, 2.0, dims, axis)
    sup = measured_support(report)
    # 2D Poisson-disc masks are slow to draw: fewer masks and points keep the chart quick
    slow = family == "poisson" and dims == 2
    grid = (2.0, 4.0, 6.0, 8.0, 12.0) if slow else NOMINAL_GRID
    c = sampling.curve(sup["shape"], sup["support"], family, grid, dims=dims, axis=axis,
                       n_masks=2 if slow else 10, seed=CALC_SEED)
    return {"nominal": c["acceleration"], "dataset": c["effective"], "raw": c["raw_effective"],
            "family": family, "dims": f"{axis}" if dims == 1 else "rows and cols"}


def _support_text(sup: dict[str, Any]) -> str:
    parts = []
    for axis, n, f in zip(("rows", "cols"), sup["shape"], sup["support"], strict=True):
        parts.append(f"all {n} {axis}" if f >= 0.999 else
                     f"about {round(f * n)} of {n} {axis} ({100 * f:.1f} %)")
    return ", ".join(parts)


def _default_layout(sup: dict[str, Any]) -> tuple[int, str]:
    rows_f, cols_f = sup["support"]
    return (1, "rows") if rows_f < cols_f else (1, "cols")


def calculator_options(report: dict[str, Any]) -> dict[str, Any] | None:
    """Form choices and the first answer for the panel."""
    sup = measured_support(report)
    dims, axis = _default_layout(sup)
    default = {"family": "polynomial", "acceleration": 4.0, "layout": f"{dims}-{axis}",
               "dims": dims, "axis": axis}
    first = effective_summary(report, family="polynomial", acceleration=4.0, dims=dims,
                              axis=axis)
    return {"families": list(FAMILY_LABELS.items()), "layouts": list(LAYOUT_LABELS.items()),
            "default": default, "support_text": _support_text(sup),
            "initial": {"nominal_text": f"{first['acceleration']:g}",
                        "effective_text": f"{first['effective_acceleration']:.2f}",
                        "raw_text": f"{first['raw_effective_acceleration']:.2f}"},
            "max_acceleration": MAX_ACCELERATION}


def default_effective(report: dict[str, Any]) -> dict[str, Any] | None:
    """The default calculator answer for the methods statement (None on a full support)."""
    sup = measured_support(report)
    if min(sup["support"]) >= 0.999:
        return None
    dims, axis = _default_layout(sup)
    res = effective_summary(report, family="polynomial", acceleration=USUAL_ACCELERATION,
                            dims=dims, axis=axis)
    # the words of app.methods.usual_effective, which the command's summary uses
    res["family"] = f"polynomial variable-density line masks along the {axis}"
    return res


def safe_default_effective(report: dict[str, Any]) -> dict[str, Any] | None:
    """:func:`default_effective`, or None when the report has no usable support."""
    try:
        return default_effective(report)
    except (ValidationError, InputError, ValueError):
        return None


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


def _layout_param(layout: str | None, dims: int, axis: str) -> tuple[int, str]:
    if layout:
        d, _, a = layout.partition("-")
        if layout not in LAYOUT_LABELS:
            raise ValidationError("Unknown mask layout; choose one the form offers.")
        return int(d), a
    return _layout(dims, axis)


@router.get("/datasets/{dataset_id}/effective-rate")
def effective_rate_json(dataset_id: int, db: DbSession,
                        family: str = Query("polynomial", max_length=40),
                        acceleration: float = Query(4.0),
                        dims: int = Query(1), axis: str = Query("cols", max_length=8),
                        layout: str | None = Query(None, max_length=12)) -> JSONResponse:
    """The effective rate for one mask family and nominal acceleration (as ``rawproof
    sampling --from-report`` with its default 20 masks and seed 0)."""
    report = _current(db, dataset_id)
    d, a = _layout_param(layout, dims, axis)
    return JSONResponse(effective_summary(report, family=family, acceleration=acceleration,
                                          dims=d, axis=a))


@router.get("/datasets/{dataset_id}/effective-rate.png")
def effective_rate_png(dataset_id: int, db: DbSession, settings: SettingsDep,
                       family: str = Query("polynomial", max_length=40),
                       acceleration: float = Query(4.0),
                       dims: int = Query(1), axis: str = Query("cols", max_length=8),
                       layout: str | None = Query(None, max_length=12)) -> Response:
    ds = service.get_dataset(db, dataset_id)
    rep = service.get_current_report(db, ds.id)
    if rep is None:
        raise NotFoundError("This dataset has no report yet.")
    d, a = _layout_param(layout, dims, axis)
    _check_inputs(family, acceleration, d, a)
    return Response(content=_chart_png(settings, rep.id, rep.data, family, d, a, acceleration),
                    media_type="image/png", headers=PNG_HEADERS)


#: effective-rate charts kept per report (one per family, layout and marked R asked
#: for); the least recently made go first, so that a stream of distinct accelerations
#: cannot fill the disk (issue 21, finding 13)
MAX_CHARTS_PER_REPORT = 48


def _prune_charts(folder: Path, keep: int = MAX_CHARTS_PER_REPORT) -> None:
    """Remove the oldest ``effective-*.png`` in ``folder`` so that one more fits ``keep``."""
    dated = []
    for p in folder.glob("effective-*.png"):
        try:
            dated.append((p.stat().st_mtime, p))
        except FileNotFoundError:  # removed by a parallel request
            continue
    dated.sort()
    for _, old in dated[: max(0, len(dated) - keep + 1)]:
        old.unlink(missing_ok=True)


def _chart_png(settings: Settings, report_id: int, report: dict[str, Any], family: str,
               d: int, a: str, acceleration: float) -> bytes:
    """The calculator's chart, cached per report, family, layout and marked R."""
    path = _cache_dir(settings, report_id) / f"effective-{family}-{d}-{a}-{acceleration:g}.png"

    def make() -> bytes:
        cpath = _cache_dir(settings, report_id) / f"curve-{family}-{d}-{a}.json"
        if cpath.is_file():
            curves = json.loads(cpath.read_text(encoding="utf-8"))
        else:
            curves = curves_for_report(report, family=family, dims=d, axis=a)
            _write_atomic(cpath, json.dumps(curves).encode("utf-8"))
        here = effective_summary(report, family=family, acceleration=acceleration, dims=d,
                                 axis=a)["effective_acceleration"]
        return figures.to_png(figures.build_effective_curve(curves, marker=acceleration,
                                                            marker_effective=here))

    if not path.is_file():
        _prune_charts(path.parent)
    return _cached_png(path, make)


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
    from app.probe_jobs import latest_result

    dec = service.current_decision(db, dataset)
    decision = {"outcome": dec.outcome, "rationale": dec.rationale} if dec else None
    return methods_statement(report, decision, effective=safe_default_effective(report),
                             probe=latest_result(db, dataset.id))


def warm_cache(settings: Settings, report_id: int, report: dict[str, Any]) -> int:
    """Render a report's figures, previews and default calculator chart into the cache now.

    ``rawproof demo`` calls this so that the first visit to each page is as quick
    as later ones. Returns the number of PNGs written or found.
    """
    n = 0
    cache = _cache_dir(settings, report_id)
    for spec in figures.available(report):
        if _cached_png(cache / f"{spec.name}.png",
                       lambda name=spec.name: figures.render(name, report)) is not None:
            n += 1
    for g in preview_index(settings, report_id):
        for kind in PREVIEW_KINDS:
            for i in range(g["n"]):
                _cached_png(cache / f"preview-{g['group']}-{kind}-{i}.png",
                            lambda g=g, kind=kind, i=i: figures.preview_png(
                                _preview_array(settings, report_id, g["group"], kind, i)))
                n += 1
    try:
        opts = calculator_options(report)
    except (ValidationError, InputError):
        opts = None
    if opts is not None:
        dflt = opts["default"]
        _chart_png(settings, report_id, report, dflt["family"], dflt["dims"], dflt["axis"],
                   dflt["acceleration"])
        n += 1
    return n


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
    except (ValidationError, InputError) as exc:
        calc = {"unavailable": getattr(exc, "message", str(exc))}
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
