"""Grouping DICOM files into series and ordering their slices.

Each file's grouping attributes are read once (:func:`file_meta`), from the raw
bytes where pydicom has not converted them yet. Slices are ordered by
ImagePositionPatient projected on the slice normal (the cross product of the two
ImageOrientationPatient direction cosines), else by InstanceNumber.

References
----------
NEMA PS3.3, C.7.6.2 Image Plane Module (ImagePositionPatient,
ImageOrientationPatient; C.7.6.2.1.1 for the patient coordinate system),
C.7.6.16.2.3 Plane Position (Patient) Macro.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from app.io.dicom_dataset import transfer_syntax_of
from app.io.dicom_header import shared_item

__all__ = ["DicomItem", "FileMeta", "affine_of", "file_meta", "frame_order", "order_slices",
           "series_name"]


@dataclass
class FileMeta:
    """The attributes grouping, ordering and stacking need, read once per file."""

    series_uid: str
    rows: int
    cols: int
    spp: int
    frames: int
    bits_allocated: int
    bits_stored: int
    signed: bool
    ts: str
    normal: tuple[float, ...] | None
    ipp: np.ndarray | None
    instance: int | None
    slope: float
    intercept: float

    @property
    def group_key(self) -> tuple:
        orient = tuple(round(v, 3) for v in self.normal) if self.normal is not None else None
        return (self.series_uid, self.rows, self.cols, self.spp, orient)

    @property
    def declared_bytes(self) -> int:
        return self.rows * self.cols * self.frames * self.spp * max(1, self.bits_allocated // 8)


@dataclass
class DicomItem:
    path: Path
    ds: Any
    meta: FileMeta | None = None


def _text_values(ds: Any, tag: int) -> list[str] | None:
    """The backslash-separated values of a text element (DS, IS, UI), parsed from the
    raw bytes when pydicom has not converted them yet: text values do not depend on
    byte order or VR encoding, and a series read touches these in every file."""
    try:
        elem = ds.get_item(tag)
    except (KeyError, TypeError):
        return None
    if elem is None:
        return None
    v = elem.value
    if v is None:
        return None
    if isinstance(v, bytes):
        text = v.decode("latin-1").strip(" \x00")
        return [t.strip() for t in text.split("\\")] if text else None
    if isinstance(v, str):
        return [v.strip()] if v.strip() else None
    try:
        return [str(x) for x in v]
    except TypeError:
        return [str(v)]


def _floats(ds: Any, tag: int, n: int) -> tuple[float, ...] | None:
    vals = _text_values(ds, tag)
    if vals is None or len(vals) != n:
        return None
    try:
        return tuple(float(x) for x in vals)
    except ValueError:
        return None


def _ushort(ds: Any, tag: int, default: int, order: str) -> int:
    """An US element (Rows, BitsAllocated, ...) from its raw two bytes when unconverted."""
    try:
        elem = ds.get_item(tag)
    except (KeyError, TypeError):
        return default
    if elem is None or elem.value is None:
        return default
    v = elem.value
    if isinstance(v, bytes):
        return int.from_bytes(v[:2], "big" if order == "big" else "little") if len(v) >= 2 \
            else default
    try:
        return int(v)
    except (TypeError, ValueError):
        return default


def _unit_normal(iop: tuple[float, ...]) -> tuple[float, ...] | None:
    r, c = iop[:3], iop[3:]
    n = (r[1] * c[2] - r[2] * c[1], r[2] * c[0] - r[0] * c[2], r[0] * c[1] - r[1] * c[0])
    norm = math.sqrt(n[0] ** 2 + n[1] ** 2 + n[2] ** 2)
    return None if norm == 0 else (n[0] / norm, n[1] / norm, n[2] / norm)


def file_meta(ds: Any) -> FileMeta:
    iop = _floats(ds, 0x00200037, 6)
    ipp = _floats(ds, 0x00200032, 3)
    inst = _floats(ds, 0x00200013, 1)
    slope = _floats(ds, 0x00281053, 1)
    intercept = _floats(ds, 0x00281052, 1)
    uid = _text_values(ds, 0x0020000E)
    frames = _floats(ds, 0x00280008, 1)
    ts = transfer_syntax_of(ds)
    order = "big" if ts == "1.2.840.10008.1.2.2" else "little"
    bits_allocated = _ushort(ds, 0x00280100, 16, order) or 16
    return FileMeta(
        series_uid=uid[0] if uid else "",
        rows=_ushort(ds, 0x00280010, 0, order),
        cols=_ushort(ds, 0x00280011, 0, order),
        spp=_ushort(ds, 0x00280002, 1, order) or 1,
        frames=max(1, int(frames[0])) if frames else 1,
        bits_allocated=bits_allocated,
        bits_stored=_ushort(ds, 0x00280101, bits_allocated, order) or bits_allocated,
        signed=_ushort(ds, 0x00280103, 0, order) == 1,
        ts=ts,
        normal=_unit_normal(iop) if iop is not None else None,
        ipp=np.asarray(ipp) if ipp is not None else None,
        instance=int(inst[0]) if inst else None,
        slope=slope[0] if slope and slope[0] != 0 else 1.0,
        intercept=intercept[0] if intercept else 0.0,
    )


def order_slices(items: list[DicomItem]) -> tuple[list[DicomItem], float | None, int]:
    """Sort slices by position along the normal (then InstanceNumber).

    Returns the items, the slice spacing along the normal (mm) and the number of
    repetitions per position: when every position occurs equally often (time
    series, multiple echoes), the items come time-major (all positions of the
    first repetition, then the second...) so the stack reshapes to
    ``(repetitions, positions, rows, cols)``.
    """
    normal = items[0].meta.normal
    inst_ok = all(it.meta.instance is not None for it in items)
    if normal is not None and all(it.meta.ipp is not None for it in items):
        nv = np.asarray(normal)
        proj = np.round(np.asarray([float(np.dot(it.meta.ipp, nv)) for it in items]), 4)
        uniq, counts = np.unique(proj, return_counts=True)
        if len(uniq) == len(proj) or (len(uniq) > 1 and np.all(counts == counts[0])):
            reps = int(counts[0])
            inst = [it.meta.instance or 0 for it in items] if inst_ok else list(range(len(items)))
            by_pos = np.lexsort((inst, proj))  # position-major, InstanceNumber within
            rank = np.empty(len(items), dtype=int)
            rank[by_pos] = np.tile(np.arange(reps), len(uniq))
            pos_index = np.searchsorted(uniq, proj)
            order = np.lexsort((pos_index, rank))  # repetition-major, position within
            sp = np.diff(uniq)
            spacing = float(np.median(np.abs(sp))) if len(sp) else None
            return [items[i] for i in order], spacing, reps
    if inst_ok:
        order = np.argsort([it.meta.instance for it in items], kind="stable")
        items = [items[i] for i in order]
    return items, None, 1


def frame_order(ds: Any, n_frames: int) -> np.ndarray | None:
    """Frame order by PlanePositionSequence projected on the slice normal, if all frames
    have one and the positions differ (PS3.3 C.7.6.16.2.3), else None."""
    per = ds.get("PerFrameFunctionalGroupsSequence")
    if not per or len(per) != n_frames:
        return None
    ori = shared_item(ds, "PlaneOrientationSequence")
    iop = ori.get("ImageOrientationPatient") if ori is not None else None
    if iop is None or len(iop) != 6:
        return None
    n = np.cross([float(v) for v in iop[:3]], [float(v) for v in iop[3:]])
    proj = []
    for item in per:
        pos = item.get("PlanePositionSequence")
        ipp = pos[0].get("ImagePositionPatient") if pos else None
        if ipp is None or len(ipp) != 3:
            return None
        proj.append(float(np.dot([float(v) for v in ipp], n)))
    proj_a = np.asarray(proj)
    if len(np.unique(np.round(proj_a, 4))) != len(proj_a):
        return None
    order = np.argsort(proj_a, kind="stable")
    return None if np.all(order == np.arange(n_frames)) else order


def series_name(ds: Any, path: Path) -> str:
    num = ds.get("SeriesNumber")
    desc = str(ds.get("SeriesDescription", "") or "").strip()
    label = " ".join(s for s in (f"series {num}" if num not in (None, "") else "", desc) if s)
    return label or path.stem


def affine_of(ds: Any, slice_mm: float | None) -> np.ndarray | None:
    iop = ds.get("ImageOrientationPatient")
    ipp = ds.get("ImagePositionPatient")
    ps = ds.get("PixelSpacing")
    if iop is None or ipp is None or ps is None or len(iop) != 6 or len(ps) != 2:
        return None
    r = np.asarray([float(v) for v in iop[:3]])
    c = np.asarray([float(v) for v in iop[3:]])
    n = np.cross(r, c)
    a = np.eye(4)
    # voxel index order (slice, row, col) -> patient coordinates (PS3.3 C.7.6.2.1.1)
    a[:3, 2] = r * float(ps[1])
    a[:3, 1] = c * float(ps[0])
    a[:3, 0] = n * (slice_mm or 1.0)
    a[:3, 3] = [float(v) for v in ipp]
    return a
