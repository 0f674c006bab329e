"""Reading one DICOM file's data set safely: bounded reads, damaged-file errors.

A forged element length must not make pydicom allocate gigabytes, a damaged
element must become an :class:`~app.errors.InputError` a person can act on, and
pydicom's own log and warnings stay off stderr.

References
----------
NEMA PS3.10, Section 7 (DICOM file format: preamble, meta information).
"""

from __future__ import annotations

import contextlib
import io
import logging
import os
import warnings as _warnings
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from app.errors import InputError
from app.io.dicom_syntax import DEFAULT_TRANSFER_SYNTAX
from app.io.options import one_line

__all__ = ["damaged_file", "quiet_pydicom", "read_dataset", "transfer_syntax_of"]


def _forced(path: Path) -> Any:
    """A file named like DICOM but without the preamble and meta header (older
    implementations wrote those): read it if it holds an image or names its SOP
    class, else None."""

    try:
        with quiet_pydicom():
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
def damaged_file(path: Path) -> Iterator[None]:
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


def read_dataset(path: Path) -> Any:
    from pydicom.errors import InvalidDicomError

    try:
        with quiet_pydicom(), _warnings.catch_warnings(record=True) as caught:
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


def transfer_syntax_of(ds: Any) -> str:
    meta = getattr(ds, "file_meta", None)
    uid = meta.get("TransferSyntaxUID") if meta is not None else None
    return str(uid) if uid is not None else DEFAULT_TRANSFER_SYNTAX


@contextlib.contextmanager
def quiet_pydicom() -> Iterator[None]:
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
