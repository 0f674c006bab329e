"""DICOM pixel data: decoding, the fast copy of uncompressed frames, bit masking.

Compressed transfer syntaxes are decoded by pydicom's pixel handlers (pylibjpeg
plugins for JPEG, JPEG-LS, JPEG 2000 and RLE); uncompressed frames of a series
are copied straight from the bytes into one preallocated stack.

References
----------
NEMA PS3.5, Section 8.2 and Annex A.4 (native and encapsulated pixel data);
NEMA PS3.3, C.7.6.3 Image Pixel Module (BitsAllocated, BitsStored,
PixelRepresentation, PhotometricInterpretation).
"""

from __future__ import annotations

import numpy as np

from app.errors import InputError
from app.io.dicom_dataset import quiet_pydicom, transfer_syntax_of
from app.io.dicom_header import header_fields
from app.io.dicom_series import DicomItem, FileMeta
from app.io.dicom_syntax import JPEG_DCT_SYNTAXES, LOSSY_SYNTAXES, syntax_of
from app.io.options import one_line
from app.io.volume import Header

__all__ = ["UndecodablePixelsError", "copy_native", "decode_pixels", "fix_unused_bits",
           "luminance", "native_dtype", "stored_range"]


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


def _undecodable(item: DicomItem, exc: Exception) -> UndecodablePixelsError:
    hdr = header_fields(item.ds)
    f = hdr.fields
    parts = [f"{item.path.name}: the pixel data ({f.get('transfer_syntax_name')}, "
             f"{f.get('transfer_syntax')}) could not be decoded by the installed decoders"]
    declared = []
    if f.get("lossy_compression") or f.get("transfer_syntax") in LOSSY_SYNTAXES:
        declared.append("declared lossy" + (" JPEG" if f.get("transfer_syntax")
                                             in JPEG_DCT_SYNTAXES else ""))
    if f.get("jpeg_quant_tables"):
        # what the tables mean (an IJG quality) is the analysers' reading, not the reader's
        n = len(f["jpeg_quant_tables"])
        declared.append(f"{n} stored JPEG quantisation table{'s' if n > 1 else ''}")
    msg = parts[0] + (f"; header evidence: {', '.join(declared)}" if declared else "")
    said = " ".join(str(exc).split())  # one line: decoders report over several
    msg += f". Decoder said: {said[:200]}"
    return UndecodablePixelsError(msg, str(item.path), hdr)


def decode_pixels(item: DicomItem) -> np.ndarray:
    try:
        with quiet_pydicom():
            arr = item.ds.pixel_array
    except (MemoryError, KeyboardInterrupt):
        raise
    except Exception as exc:  # noqa: BLE001 - decoders raise many types
        ts = transfer_syntax_of(item.ds)
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


def native_dtype(m: FileMeta) -> np.dtype | None:
    """The stored dtype when pixels can be copied from the bytes, else None."""
    ts = syntax_of(m.ts)
    if (ts is None or ts.method != "uncompressed" or ts.byte_order is None or m.spp != 1
            or m.frames != 1 or m.bits_allocated not in (8, 16, 32)):
        return None
    kind = "i" if m.signed else "u"
    return np.dtype(f"{ts.byte_order}{kind}{m.bits_allocated // 8}")


def copy_native(item: DicomItem, out: np.ndarray, dtype: np.dtype) -> None:
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


def fix_unused_bits(data: np.ndarray, m: FileMeta) -> None:
    """Mask (unsigned) or sign-extend (signed) bits above BitsStored, as pydicom does."""
    spare = m.bits_allocated - m.bits_stored
    if spare <= 0 or m.bits_stored <= 0:
        return
    if m.signed:
        data <<= spare
        data >>= spare
    else:
        data &= np.asarray((1 << m.bits_stored) - 1, dtype=data.dtype)


def luminance(arr: np.ndarray, photometric: str) -> np.ndarray:
    """BT.601 luma of the RGB pixels pydicom returns (it converts YBR to RGB),
    rounded back to the stored integer type as Pillow's ``convert("L")`` does."""
    w = np.asarray([0.299, 0.587, 0.114], dtype=np.float32)
    y = arr[..., :3].astype(np.float32) @ w
    if np.issubdtype(arr.dtype, np.integer):
        info = np.iinfo(arr.dtype)
        return np.clip(np.rint(y), info.min, info.max).astype(arr.dtype)
    return y


def stored_range(data: np.ndarray) -> list[float]:
    if data.size == 0:
        return []
    return [float(np.min(data)), float(np.max(data))]


def split_mosaic(arr: np.ndarray, n_images: int) -> np.ndarray | None:
    """Cut a Siemens MOSAIC frame into its slices, ``(n_images, rows, cols)``.

    The mosaic holds ``k x k`` equal tiles with ``k = ceil(sqrt(n_images))``,
    filled row by row; tiles past ``n_images`` are blank padding. Returns None when
    the frame cannot hold such a grid (the caller keeps the frame as it is).

    References
    ----------
    Siemens MOSAIC layout as read by nibabel's ``nibabel.nicom.dicomwrappers``
    (common practice, no published standard).
    """
    if arr.ndim != 2 or n_images < 2:
        return None
    k = int(np.ceil(np.sqrt(n_images)))
    rows, cols = arr.shape
    if rows % k or cols % k:
        return None
    tr, tc = rows // k, cols // k
    tiles = arr.reshape(k, tr, k, tc).transpose(0, 2, 1, 3).reshape(k * k, tr, tc)
    return np.ascontiguousarray(tiles[:n_images])


def unmosaic(data: np.ndarray, fields: dict) -> np.ndarray:
    """Split every MOSAIC frame of ``data`` (``(..., rows, cols)``) into its slices when
    the header fields name a mosaic count (``mosaic_images``); the fields' ``rows``
    and ``columns`` become the tile's and ``mosaic_grid`` records the split."""
    n = fields.get("mosaic_images")
    if not n or data.ndim < 2:
        return data
    lead = data.shape[:-2]
    flat = data.reshape((-1,) + data.shape[-2:])
    parts = [split_mosaic(f, int(n)) for f in flat]
    if any(p is None for p in parts):
        fields["mosaic_split_failed"] = True
        return data
    out = np.stack(parts)
    out = out.reshape(lead + out.shape[1:]) if lead else out[0]
    fields["mosaic_grid"] = [int(data.shape[-2]), int(data.shape[-1])]
    fields["rows"], fields["columns"] = int(out.shape[-2]), int(out.shape[-1])
    return out
