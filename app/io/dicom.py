"""DICOM reader: files -> one Volume per series (or per multi-frame file).

Each file is read once. Slices are ordered by ImagePositionPatient projected on
the slice normal (the cross product of the two ImageOrientationPatient
direction cosines), else by InstanceNumber, and stacked into one preallocated
array of *stored* values; RescaleSlope/RescaleIntercept go to ``Volume.scale``
and ``Volume.offset``. Compressed transfer syntaxes are decoded by pydicom's
pixel handlers (pylibjpeg plugins for JPEG, JPEG-LS, JPEG 2000 and RLE).

References
----------
NEMA PS3.3 (DICOM Information Object Definitions), C.7.6.2 Image Plane Module
(ImagePositionPatient, ImageOrientationPatient), C.7.6.1 General Image Module
(ImageType, LossyImageCompression), C.8.3.1 MR Image Module (AcquisitionMatrix,
InPlanePhaseEncodingDirection, PercentPhaseFieldOfView, PercentSampling).
NEMA PS3.5, Section 8.2 and Annex A.4 (encapsulated transfer syntaxes).
"""

from __future__ import annotations

import contextlib
import io
import logging
import math
import os
import warnings as _warnings
from collections import defaultdict
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from app.errors import InputError
from app.io.jpeg_markers import parse_jpeg_markers
from app.io.options import ReadOptions, check_array_bytes, one_line
from app.io.volume import Header, Volume

#: Transfer syntaxes whose pixel data went through a lossy coder (PS3.5 / PS3.6).
LOSSY_TRANSFER_SYNTAXES = {
    "1.2.840.10008.1.2.4.50": "JPEG baseline (process 1)",
    "1.2.840.10008.1.2.4.51": "JPEG extended (processes 2 and 4)",
    "1.2.840.10008.1.2.4.81": "JPEG-LS near-lossless",
    "1.2.840.10008.1.2.4.91": "JPEG 2000 (may be irreversible)",
    "1.2.840.10008.1.2.4.93": "JPEG 2000 Part 2 multi-component (may be irreversible)",
    "1.2.840.10008.1.2.4.100": "MPEG2 main profile",
    "1.2.840.10008.1.2.4.101": "MPEG2 main profile high level",
    "1.2.840.10008.1.2.4.102": "MPEG-4 AVC/H.264",
    "1.2.840.10008.1.2.4.103": "MPEG-4 AVC/H.264 BD-compatible",
    "1.2.840.10008.1.2.4.110": "JPEG XL",
    "1.2.840.10008.1.2.4.112": "JPEG XL JPEG recompression",
    "1.2.840.10008.1.2.4.203": "High-Throughput JPEG 2000 (may be irreversible)",
}
#: Transfer syntaxes that carry a JPEG (ITU-T T.81) stream with quantisation tables.
JPEG_DCT_TRANSFER_SYNTAXES = {"1.2.840.10008.1.2.4.50", "1.2.840.10008.1.2.4.51"}

_RAW_SKIP = {"PixelData", "FloatPixelData", "DoubleFloatPixelData", "OverlayData"}


class UndecodablePixelsError(InputError):
    """Pixel data no installed decoder can read; the header evidence is attached.

    Attributes
    ----------
    header : Header
        The normalised header fields (declared compression, stored JPEG tables).
    """

    def __init__(self, message: str, path: str, header: Header) -> None:
        super().__init__("undecodable_pixels", message, path)
        self.header = header


#: Uncompressed transfer syntaxes whose pixels can be copied straight from the bytes.
_NATIVE_TS = {"1.2.840.10008.1.2": "<", "1.2.840.10008.1.2.1": "<", "1.2.840.10008.1.2.2": ">"}


@dataclass
class _Meta:
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
class _Item:
    path: Path
    ds: Any
    meta: _Meta | None = None


def is_dicom_file(path: Path) -> bool:
    """True when the file has the DICOM preamble magic ``DICM`` at byte 128."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(132)
    except OSError:
        return False
    return len(head) == 132 and head[128:132] == b"DICM"


def _text(value: Any) -> str:
    s = str(value)
    return s if len(s) <= 200 else s[:197] + "..."


def _float_or_none(value: Any) -> float | None:
    if value is None or value == "":
        return None
    if not isinstance(value, str | bytes) and hasattr(value, "__len__"):
        if len(value) == 0:
            return None
        value = value[0]
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


def _int_or_none(value: Any) -> int | None:
    f = _float_or_none(value)
    return None if f is None else int(f)


def _forced(path: Path) -> Any:
    """A file named like DICOM but without the preamble and meta header (older
    implementations wrote those): read it if it holds an image or names its SOP
    class, else None."""

    try:
        with _quiet_pydicom():
            ds = _dcmread(path, force=True)
        ok = ("PixelData" in ds and int(ds.get("Rows", 0) or 0) > 0) or "SOPClassUID" in ds
    except Exception:  # noqa: BLE001 - not DICOM after all
        return None
    return ds if ok else None


class _CappedReader(io.BufferedReader):
    """A file whose reads never ask for more bytes than are left in it.

    CPython allocates the requested size before reading, so a forged element
    length (say 0xFFFFFFF0) in a small file would allocate gigabytes inside
    pydicom's parser; capping each read at the remaining size keeps the
    allocation at most the file's size and changes nothing else (a short read is
    what the end of the file gives anyway).
    """

    def __init__(self, path: Path) -> None:
        super().__init__(io.FileIO(str(path), "rb"))
        self._size = os.fstat(self.fileno()).st_size

    def read(self, size: int | None = -1) -> bytes:
        if size is not None and size > 0:
            size = min(size, max(0, self._size - self.tell()))
            if size == 0:
                return b""
        return super().read(size)


def _dcmread(path: Path, **kwargs: Any) -> Any:
    import pydicom

    with _CappedReader(path) as fh:
        return pydicom.dcmread(fh, **kwargs)


def _check_deferred_lengths(ds: Any, path: Path) -> None:
    """Refuse elements whose declared length runs past the end of the file.

    pydicom defers reading large values and then asks the file for the declared
    number of bytes at once, which allocates that many bytes first (4 GiB for a
    forged length of 0xFFFFFFF0 in a file of a few kB). The declared length is
    checked against the file size before any deferred value is read.
    """
    from pydicom.dataelem import RawDataElement

    size = path.stat().st_size
    for tag in list(ds.keys()):
        elem = ds.get_item(tag, keep_deferred=True)
        if not isinstance(elem, RawDataElement) or elem.value is not None:
            continue
        length = int(elem.length)
        if length != 0xFFFFFFFF and int(elem.value_tell) + length > size:
            raise InputError(
                "truncated_dicom",
                f"{path.name}: element {elem.tag} declares {length} bytes, beyond the end of "
                f"the file ({size} bytes): damaged or truncated file.",
                str(path),
            )


@contextlib.contextmanager
def _damaged(path: Path) -> Iterator[None]:
    """Turn a pydicom failure on a damaged element (wrong length for its VR, an
    unknown VR, a number that does not parse) into the reader's InputError."""
    try:
        yield
    except (InputError, MemoryError, KeyboardInterrupt):
        raise
    except Exception as exc:  # noqa: BLE001 - pydicom raises many types on damaged elements
        raise InputError(
            "truncated_dicom",
            f"{path.name} has a damaged header element: {one_line(exc)}",
            str(path),
        ) from exc


def _read_dataset(path: Path) -> Any:
    from pydicom.errors import InvalidDicomError

    try:
        with _quiet_pydicom(), _warnings.catch_warnings(record=True) as caught:
            _warnings.simplefilter("always")
            ds = _dcmread(path, defer_size="1 MB")
    except InvalidDicomError as exc:
        tried = path.suffix.lower() in (".dcm", ".dicom", ".ima")
        ds = _forced(path) if tried else None
        if ds is None:
            # pydicom's own text advises force=True, which rawproof has already tried
            # for DICOM-named files; say what was found instead
            also = (", and read without one it holds no DICOM data elements either"
                    if tried else "")
            raise InputError(
                "unreadable",
                f"{path.name} is not a DICOM file: it has no DICOM file header (no 'DICM' "
                f"prefix){also}.",
                str(path),
            ) from exc
        caught = []
    except Exception as exc:  # noqa: BLE001 - pydicom raises many types on damaged files
        raise InputError(
            "truncated_dicom",
            f"{path.name} could not be parsed as DICOM (damaged or truncated): {one_line(exc)}",
            str(path),
        ) from exc
    _check_deferred_lengths(ds, path)
    if "PixelData" not in ds and "FloatPixelData" not in ds and "DoubleFloatPixelData" not in ds:
        cut = [str(w.message) for w in caught if "end of file" in str(w.message).lower()]
        if cut or len(ds) == 0:
            raise InputError(
                "truncated_dicom",
                f"{path.name} ends before its data set does (truncated file)"
                + (f": {cut[0][:120]}" if cut else "."),
                str(path),
            )
        sop = ds.get("SOPClassUID") or getattr(ds, "file_meta", {}).get(
            "MediaStorageSOPClassUID", "unknown")
        raise InputError(
            "no_pixel_data",
            f"{path.name} is a DICOM file without image pixels "
            f"(SOP class {getattr(sop, 'name', sop)}); give image files.",
            str(path),
        )
    return ds


def _transfer_syntax(ds: Any) -> str:
    meta = getattr(ds, "file_meta", None)
    uid = meta.get("TransferSyntaxUID") if meta is not None else None
    return str(uid) if uid is not None else "1.2.840.10008.1.2"


def _jpeg_tables(ds: Any) -> tuple[list[list[int]], dict[str, Any]]:
    """Quantisation tables of the first encapsulated JPEG frame (natural order)."""
    from pydicom.encaps import generate_frames

    try:
        n_frames = int(ds.get("NumberOfFrames", 1) or 1)
        frame = next(generate_frames(ds.PixelData, number_of_frames=n_frames))
        m = parse_jpeg_markers(frame)
    except Exception:  # noqa: BLE001 - a stream we cannot parse simply has no table evidence
        return [], {}
    lum = m.luminance_table()
    order = sorted(m.tables)
    if lum is not None:
        order = sorted(order, key=lambda k: m.tables[k] is not lum)
    tables = [m.tables[k].reshape(64).astype(int).tolist() for k in order]
    return tables, {"jpeg_process": m.process, "jpeg_precision": m.precision}


def header_fields(ds: Any) -> Header:
    """Normalised provenance fields and a raw summary of one dataset.

    Parameters
    ----------
    ds : pydicom.Dataset

    Returns
    -------
    Header
        ``fields`` uses the keys documented in :class:`app.io.volume.Header`.
    """
    from pydicom.uid import UID

    f: dict[str, Any] = {}
    ts = _transfer_syntax(ds)
    f["transfer_syntax"] = ts
    try:
        f["transfer_syntax_name"] = UID(ts).name
    except Exception:  # noqa: BLE001
        f["transfer_syntax_name"] = ts
    it = ds.get("ImageType")
    if it is not None:
        vals = [str(v) for v in (it if not isinstance(it, str) else it.split("\\"))]
        f["image_type"] = vals
    lic = ds.get("LossyImageCompression")
    if lic is not None and str(lic).strip() != "":
        f["lossy_compression"] = str(lic).strip() == "01"
    ratio = ds.get("LossyImageCompressionRatio")
    if ratio not in (None, ""):
        vals = ratio if not isinstance(ratio, str | float | int) else [ratio]
        try:
            f["lossy_ratio"] = float(list(vals)[0])
        except (TypeError, ValueError, IndexError):
            pass
    method = ds.get("LossyImageCompressionMethod")
    if method not in (None, ""):
        m = method if isinstance(method, str) else "\\".join(str(v) for v in method)
        f["lossy_method"] = m
    am = ds.get("AcquisitionMatrix")
    if am is not None and len(am) == 4:
        f["acquisition_matrix"] = [int(v) for v in am]
    f["rows"] = int(ds.get("Rows", 0) or 0)
    f["columns"] = int(ds.get("Columns", 0) or 0)
    for key, name in (
        ("InPlanePhaseEncodingDirection", "phase_encoding_direction"),
        ("DerivationDescription", "derivation_description"),
        ("Modality", "modality"),
        ("Manufacturer", "manufacturer"),
        ("PhotometricInterpretation", "photometric_interpretation"),
    ):
        v = ds.get(key)
        if v not in (None, ""):
            f[name] = str(v).strip()
    for key, name in (("PercentPhaseFieldOfView", "percent_phase_fov"),
                      ("PercentSampling", "percent_sampling"),
                      ("RescaleSlope", "rescale_slope"),
                      ("RescaleIntercept", "rescale_intercept")):
        v = _float_or_none(ds.get(key))
        if v is not None:
            f[name] = v
    for key, name in (("BitsStored", "bits_stored"), ("BitsAllocated", "bits_allocated"),
                      ("PixelRepresentation", "pixel_representation"),
                      ("SamplesPerPixel", "samples_per_pixel")):
        v = _int_or_none(ds.get(key))
        if v is not None:
            f[name] = v
    ps = ds.get("PixelSpacing")
    if ps is not None and len(ps) == 2:
        f["pixel_spacing"] = [float(ps[0]), float(ps[1])]
    _functional_groups(ds, f)
    if ts in JPEG_DCT_TRANSFER_SYNTAXES and "PixelData" in ds:
        tables, extra = _jpeg_tables(ds)
        if tables:
            f["jpeg_quant_tables"] = tables
        f.update({k: v for k, v in extra.items() if v is not None})
    raw: dict[str, Any] = {}
    for elem in ds:
        kw = elem.keyword
        if not kw or kw in _RAW_SKIP or elem.VR == "SQ" or elem.tag.is_private:
            continue
        try:
            raw[kw] = _text(elem.value)
        except Exception:  # noqa: BLE001
            continue
    return Header(fields=f, raw=raw)


def _shared_item(ds: Any, sequence: str) -> Any:
    """First item of ``sequence`` in the shared (else the first per-frame) functional group."""
    for groups in ("SharedFunctionalGroupsSequence", "PerFrameFunctionalGroupsSequence"):
        seq = ds.get(groups)
        if seq and len(seq) and sequence in seq[0] and len(seq[0][sequence].value):
            return seq[0][sequence].value[0]
    return None


def _functional_groups(ds: Any, f: dict[str, Any]) -> None:
    """Fill pixel spacing and acquisition matrix from enhanced multi-frame macros.

    PS3.3 C.7.6.16 (Multi-frame Functional Groups): Pixel Measures macro
    (PixelSpacing) and MR FOV/Geometry macro (MRAcquisitionFrequencyEncodingSteps,
    MRAcquisitionPhaseEncodingStepsInPlane, InPlanePhaseEncodingDirection,
    PercentSampling, PercentPhaseFieldOfView).
    """
    if "pixel_spacing" not in f:
        pm = _shared_item(ds, "PixelMeasuresSequence")
        ps = pm.get("PixelSpacing") if pm is not None else None
        if ps is not None and len(ps) == 2:
            f["pixel_spacing"] = [float(ps[0]), float(ps[1])]
    geo = _shared_item(ds, "MRFOVGeometrySequence")
    if geo is None:
        return
    direction = str(geo.get("InPlanePhaseEncodingDirection", "") or "").strip().upper()
    if direction and "phase_encoding_direction" not in f:
        f["phase_encoding_direction"] = direction
    for key, name in (("PercentPhaseFieldOfView", "percent_phase_fov"),
                      ("PercentSampling", "percent_sampling")):
        v = _float_or_none(geo.get(key))
        if v is not None and name not in f:
            f[name] = v
    freq = _int_or_none(geo.get("MRAcquisitionFrequencyEncodingSteps"))
    phase = _int_or_none(geo.get("MRAcquisitionPhaseEncodingStepsInPlane"))
    if "acquisition_matrix" not in f and freq and phase and direction in ("ROW", "COL"):
        f["acquisition_matrix"] = [freq, 0, 0, phase] if direction == "COL" else [0, freq,
                                                                                  phase, 0]


def _frame_order(ds: Any, n_frames: int) -> np.ndarray | None:
    """Frame order by PlanePositionSequence projected on the slice normal, if all frames
    have one and the positions differ (PS3.3 C.7.6.16.2.3), else None."""
    per = ds.get("PerFrameFunctionalGroupsSequence")
    if not per or len(per) != n_frames:
        return None
    ori = _shared_item(ds, "PlaneOrientationSequence")
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


def read_header_only(path: str | Path) -> Header:
    """Read one DICOM file's header (and its JPEG tables) without decoding pixels.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    Header

    Raises
    ------
    InputError
        When the file is not DICOM or is damaged.
    """
    return header_fields(_read_dataset(Path(path)))


def _undecodable(item: _Item, exc: Exception) -> UndecodablePixelsError:
    from app.traces.jpeg_tables import match_quality

    hdr = header_fields(item.ds)
    f = hdr.fields
    parts = [f"{item.path.name}: the pixel data ({f.get('transfer_syntax_name')}, "
             f"{f.get('transfer_syntax')}) could not be decoded by the installed decoders"]
    declared = []
    if f.get("lossy_compression") or f.get("transfer_syntax") in LOSSY_TRANSFER_SYNTAXES:
        declared.append("declared lossy" + (" JPEG" if f.get("transfer_syntax")
                                             in JPEG_DCT_TRANSFER_SYNTAXES else ""))
    if f.get("jpeg_quant_tables"):
        q, _err, exact = match_quality(np.asarray(f["jpeg_quant_tables"][0]).reshape(8, 8))
        declared.append(f"stored table quality {q}" + ("" if exact else " (nearest IJG quality)"))
    msg = parts[0] + (f"; header evidence: {', '.join(declared)}" if declared else "")
    said = " ".join(str(exc).split())  # one line: decoders report over several
    msg += f". Decoder said: {said[:200]}"
    return UndecodablePixelsError(msg, str(item.path), hdr)


@contextlib.contextmanager
def _quiet_pydicom() -> Iterator[None]:
    """Keep pydicom's decoder log (with tracebacks) off stderr; errors are re-raised."""
    log = logging.getLogger("pydicom")
    level = log.level
    log.setLevel(logging.CRITICAL)
    try:
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore")
            yield
    finally:
        log.setLevel(level)


def _pixels(item: _Item) -> np.ndarray:
    try:
        with _quiet_pydicom():
            arr = item.ds.pixel_array
    except (MemoryError, KeyboardInterrupt):
        raise
    except Exception as exc:  # noqa: BLE001 - decoders raise many types
        ts = _transfer_syntax(item.ds)
        if ts.startswith("1.2.840.10008.1.2.4") or ts == "1.2.840.10008.1.2.5":
            raise _undecodable(item, exc) from exc
        raise InputError(
            "truncated_dicom",
            f"{item.path.name}: the pixel data could not be read "
            f"(damaged or truncated file): {one_line(exc)}",
            str(item.path),
        ) from exc
    arr = np.asarray(arr)
    if not arr.dtype.isnative:
        arr = arr.astype(arr.dtype.newbyteorder("="))
    return arr


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


def _meta(ds: Any) -> _Meta:
    iop = _floats(ds, 0x00200037, 6)
    ipp = _floats(ds, 0x00200032, 3)
    inst = _floats(ds, 0x00200013, 1)
    slope = _floats(ds, 0x00281053, 1)
    intercept = _floats(ds, 0x00281052, 1)
    uid = _text_values(ds, 0x0020000E)
    frames = _floats(ds, 0x00280008, 1)
    ts = _transfer_syntax(ds)
    order = "big" if ts == "1.2.840.10008.1.2.2" else "little"
    bits_allocated = _ushort(ds, 0x00280100, 16, order) or 16
    return _Meta(
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


def _order(items: list[_Item]) -> tuple[list[_Item], float | None, int]:
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


def _native_dtype(m: _Meta) -> np.dtype | None:
    """The stored dtype when pixels can be copied from the bytes, else None."""
    if m.ts not in _NATIVE_TS or m.spp != 1 or m.frames != 1 or m.bits_allocated not in (8, 16,
                                                                                        32):
        return None
    kind = "i" if m.signed else "u"
    return np.dtype(f"{_NATIVE_TS[m.ts]}{kind}{m.bits_allocated // 8}")


def _native_into(item: _Item, out: np.ndarray, dtype: np.dtype) -> None:
    """Copy one uncompressed frame's bytes into ``out`` (a slot of the stack)."""
    m = item.meta
    n = m.rows * m.cols * dtype.itemsize
    try:
        raw = item.ds.PixelData
    except Exception as exc:  # noqa: BLE001 - a deferred read of a damaged file
        raise InputError("truncated_dicom", f"{item.path.name}: the pixel data could not be "
                         f"read (damaged or truncated file): {one_line(exc)}",
                         str(item.path)) from exc
    if raw is None or len(raw) < n:
        have = 0 if raw is None else len(raw)
        raise InputError("truncated_dicom", f"{item.path.name}: the pixel data hold {have} "
                         f"bytes where {m.rows} x {m.cols} pixels need {n} (damaged or "
                         "truncated file).", str(item.path))
    out[...] = np.frombuffer(raw, dtype=dtype, count=m.rows * m.cols).reshape(m.rows, m.cols)


def _fix_unused_bits(data: np.ndarray, m: _Meta) -> None:
    """Mask (unsigned) or sign-extend (signed) bits above BitsStored, as pydicom does."""
    spare = m.bits_allocated - m.bits_stored
    if spare <= 0 or m.bits_stored <= 0:
        return
    if m.signed:
        data <<= spare
        data >>= spare
    else:
        data &= np.asarray((1 << m.bits_stored) - 1, dtype=data.dtype)


def _name(ds: Any, path: Path) -> str:
    num = ds.get("SeriesNumber")
    desc = str(ds.get("SeriesDescription", "") or "").strip()
    label = " ".join(s for s in (f"series {num}" if num not in (None, "") else "", desc) if s)
    return label or path.stem


def _luminance(arr: np.ndarray, photometric: str) -> np.ndarray:
    """BT.601 luma of the RGB pixels pydicom returns (it converts YBR to RGB),
    rounded back to the stored integer type as Pillow's ``convert("L")`` does."""
    w = np.asarray([0.299, 0.587, 0.114], dtype=np.float32)
    y = arr[..., :3].astype(np.float32) @ w
    if np.issubdtype(arr.dtype, np.integer):
        info = np.iinfo(arr.dtype)
        return np.clip(np.rint(y), info.min, info.max).astype(arr.dtype)
    return y


def _stored_range(data: np.ndarray) -> list[float]:
    if data.size == 0:
        return []
    return [float(np.min(data)), float(np.max(data))]


def _volume_of(items: list[_Item], opts: ReadOptions) -> Volume:
    """Stack one series (single-frame files) or wrap one multi-frame file."""
    spacing_mm: float | None = None
    reps = 1
    if len(items) > 1:
        items, spacing_mm, reps = _order(items)
    first = items[0]
    ds0 = first.ds
    m0 = first.meta
    hdr = header_fields(ds0)
    photometric = str(ds0.get("PhotometricInterpretation", "MONOCHROME2"))
    frames = m0.frames
    slopes = {(it.meta.slope, it.meta.intercept) for it in items}
    one_scale = len(slopes) == 1
    native = _native_dtype(m0)
    if len(items) == 1:
        arr = _pixels(first)
        if frames > 1 and arr.ndim >= 3 and arr.shape[0] == frames:
            order = _frame_order(ds0, frames)
            if order is not None:
                arr = arr[order]
                hdr.fields["frames_reordered"] = True
        if m0.spp > 1:
            arr = _luminance(arr, photometric)
            opts.warnings.append(f"{first.path.name}: colour ({photometric}) pixels were "
                                 "converted to luminance.")
        data = arr
    else:
        rows, cols = m0.rows, m0.cols
        data = None
        fast = native is not None and one_scale
        if fast:
            data = np.empty((len(items), rows, cols), dtype=native.newbyteorder("="))
        for k, it in enumerate(items):
            if (it.meta.rows, it.meta.cols) != (rows, cols):
                raise InputError("inconsistent_series",
                                 f"{it.path.name} has {(it.meta.rows, it.meta.cols)} pixels "
                                 f"where the series has {(rows, cols)}.", str(it.path))
            if fast and _native_dtype(it.meta) == native:
                _native_into(it, data[k], native)
            else:
                arr = _pixels(it)
                if m0.spp > 1:
                    arr = _luminance(arr, photometric)
                if data is None:
                    data = np.empty((len(items), rows, cols),
                                    dtype=arr.dtype if one_scale else np.float32)
                if one_scale:
                    data[k] = arr
                else:
                    data[k] = arr.astype(np.float32) * it.meta.slope + it.meta.intercept
            if k:
                it.ds = None  # free each dataset once its pixels are copied
        if fast:
            _fix_unused_bits(data, m0)
        if m0.spp > 1:
            opts.warnings.append(f"{_name(ds0, first.path)}: colour ({photometric}) "
                                 "pixels were converted to luminance.")
    assert data is not None
    if one_scale:
        scale, offset = next(iter(slopes))
    else:
        scale, offset = 1.0, 0.0
        opts.warnings.append(f"{_name(ds0, first.path)}: RescaleSlope/Intercept differ "
                             "between slices; physical values were computed per slice.")
    ps = hdr.fields.get("pixel_spacing")
    if data.ndim == 3 and spacing_mm is None and len(items) == 1 and frames > 1:
        spacing_mm = _float_or_none(ds0.get("SpacingBetweenSlices")) or _float_or_none(
            ds0.get("SliceThickness"))
    elif data.ndim == 3 and spacing_mm is None:
        spacing_mm = _float_or_none(ds0.get("SpacingBetweenSlices"))
    spacing = None
    if ps is not None:
        spacing = (spacing_mm or float("nan"),) * (data.ndim - 2) + (ps[0], ps[1])
        spacing = tuple(float(s) for s in spacing)
    if reps > 1:
        data = data.reshape((reps, len(items) // reps) + data.shape[1:])
        spacing = (float("nan"),) + spacing if spacing is not None else None
        hdr.fields["repetitions_per_position"] = reps
    hdr.fields["stored_value_range"] = _stored_range(data)
    hdr.fields["n_files"] = len(items)
    domain = opts.domain or "image"
    return Volume.from_array(
        data,
        domain=domain,
        format="dicom",
        source_files=[str(it.path) for it in items],
        header=hdr,
        scale=float(scale),
        offset=float(offset),
        name=_name(ds0, first.path),
        spacing=spacing,
        affine=_affine(ds0, spacing_mm),
    )


def _affine(ds: Any, slice_mm: float | None) -> np.ndarray | None:
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


def read_dicom(paths: list[Path], opts: ReadOptions) -> list[Volume]:
    """Read DICOM files into one Volume per series (each multi-frame file its own).

    Parameters
    ----------
    paths : list of Path
        Files of one or several series, in any order.
    opts : ReadOptions

    Returns
    -------
    list of Volume

    Raises
    ------
    InputError
        Damaged or truncated files, undecodable pixel data
        (:class:`UndecodablePixelsError`, which carries the header evidence),
        or more declared pixel data than ``opts.limits`` allows.

    References
    ----------
    NEMA PS3.3 C.7.6.2 (slice ordering by position along the normal).
    """
    groups: dict[tuple, list[_Item]] = defaultdict(list)
    singles: list[list[_Item]] = []
    total = 0
    errors: list[InputError] = []
    for p in paths:
        try:
            with _damaged(p):
                ds = _read_dataset(p)
                meta = _meta(ds)
        except InputError as exc:
            if len(paths) == 1:
                raise
            errors.append(exc)
            continue
        total += meta.declared_bytes
        check_array_bytes(total, opts.limits, str(p), "This DICOM input")
        item = _Item(p, ds, meta)
        if meta.frames > 1:
            singles.append([item])
        else:
            groups[meta.group_key].append(item)
    out: list[Volume] = []
    for items in [*groups.values(), *singles]:
        try:
            with _damaged(items[0].path):
                out.append(_volume_of(items, opts))
        except InputError as exc:
            if len(groups) + len(singles) == 1 and not errors:
                raise
            errors.append(exc)
    for exc in errors:
        opts.warnings.append(f"skipped: {exc.message}")
    if not out:
        raise errors[0]
    names: dict[str, int] = {}
    for v in out:
        names[v.name] = names.get(v.name, 0) + 1
    seen: dict[str, int] = {}
    for v in out:
        if names[v.name] > 1:
            seen[v.name] = seen.get(v.name, 0) + 1
            v.name = f"{v.name} #{seen[v.name]}"
    return out
