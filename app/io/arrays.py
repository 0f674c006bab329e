"""NumPy ``.npy`` / ``.npz`` reader, with an optional JSON sidecar.

The domain is ``image`` unless an npz key is named ``kspace``, a sidecar with
the same stem says ``{"domain": "kspace", "coil_axis": 0}``, or the caller
overrides it. ``.npy`` files are memory-mapped; the header's shape is checked
against the size limit and the file size before anything is mapped.

References
----------
NumPy Enhancement Proposal 1, "A simple file format for NumPy arrays" (NEP 1).
"""

from __future__ import annotations

import json
import tokenize
import zipfile
import zlib
from pathlib import Path
from typing import Any

import numpy as np

from app.errors import InputError
from app.io.options import (
    ReadOptions,
    array_axes,
    check_array_bytes,
    declared_bytes,
    is_complex_pairs,
    one_line,
)
from app.io.volume import Header, Volume

_DOMAIN_KEYS = ("kspace", "k_space", "image", "images", "img")


def _sidecar(path: Path) -> dict[str, Any]:
    stem = path.name[: -len(path.suffix)] if path.suffix else path.name
    side = path.with_name(stem + ".json")
    if not side.exists():
        return {}
    try:
        meta = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError("bad_sidecar", f"{side.name} is not valid JSON: {one_line(exc)}",
                         str(side)) from exc
    if not isinstance(meta, dict):
        raise InputError("bad_sidecar", f"{side.name} must hold a JSON object", str(side))
    dom = meta.get("domain")
    if dom is not None and dom not in ("image", "kspace"):
        raise InputError("bad_sidecar", f"{side.name}: domain must be 'image' or 'kspace', "
                         f"not {dom!r}", str(side))
    cax = meta.get("coil_axis")
    if cax is not None and not isinstance(cax, int):
        raise InputError("bad_sidecar", f"{side.name}: coil_axis must be an integer", str(side))
    return meta


def _read_npy_header(fh: Any, size: int) -> tuple[tuple[int, ...], np.dtype, bool, int]:
    """Shape, dtype, Fortran order and data offset of a ``.npy`` stream of ``size`` bytes.

    The header's declared length (2 bytes in version 1, 4 bytes in versions 2
    and 3; NEP 1) is checked against ``size`` before numpy reads that many bytes.
    """
    start = fh.tell()
    version = np.lib.format.read_magic(fh)
    width = 2 if version == (1, 0) else 4
    header_len = int.from_bytes(fh.read(width), "little")
    if header_len > size:
        raise ValueError(f"the header declares {header_len} bytes, more than the {size} bytes "
                         "of the file")
    fh.seek(start + 8)
    if version == (1, 0):
        shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh)
    else:
        shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh)
    return tuple(int(s) for s in shape), np.dtype(dtype), bool(fortran), fh.tell()


def _check_dtype(dtype: np.dtype, path: Path) -> None:
    if dtype.hasobject or dtype.fields is not None or dtype.kind not in "biufc":
        raise InputError("unsupported_dtype", f"{path.name} holds {dtype} values; rawproof "
                         "reads numeric (integer, float or complex) arrays only.", str(path))


def _check_shape(shape: tuple[int, ...], path: Path, key: str = "") -> None:
    where = f"{path.name}{'[' + key + ']' if key else ''}"
    if len(shape) < 2:
        raise InputError("not_an_image", f"{where} has shape {list(shape)}; an image needs at "
                         "least two dimensions (rows, cols).", str(path))
    if min(shape) < 0:
        raise InputError("bad_header", f"{where} declares a negative size in shape "
                         f"{list(shape)}.", str(path))
    if min(shape) == 0:
        raise InputError("empty", f"{where} has shape {list(shape)}: it holds no values.",
                         str(path))


def _complex_view(arr: np.ndarray) -> np.ndarray:
    """(..., 2) real/imaginary pairs as a complex array, without a copy when the pairs
    are contiguous (C order, memory maps included)."""
    ctype = np.complex64 if arr.dtype.itemsize <= 4 else np.complex128
    if arr.flags.c_contiguous:
        return arr.astype(arr.dtype.newbyteorder("="), copy=False).view(ctype)[..., 0]
    return (arr[..., 0] + 1j * arr[..., 1]).astype(ctype)


def _wrap(arr: Any, path: Path, fmt: str, domain: str, coil_axis: int | None,
          name: str, opts: ReadOptions | None = None) -> Volume:
    fields: dict[str, Any] = {"array_key": name}
    if is_complex_pairs(arr.shape, arr.dtype):
        nd = arr.ndim
        if coil_axis is not None and -nd <= coil_axis < nd:
            coil_axis = coil_axis % nd
        arr = _complex_view(arr)
        fields["complex_from_last_axis"] = True
        if opts is not None:
            opts.warnings.append(f"{path.name}: the last axis (size 2) was read as real and "
                                 "imaginary parts of complex values.")
    try:
        return Volume(data=arr, domain=domain, axes=array_axes(arr.ndim, coil_axis), format=fmt,
                      source_files=[str(path)], name=name,
                      header=Header(fields=fields))
    except ValueError as exc:
        raise InputError("bad_axes", f"{path.name}: {one_line(exc)}", str(path)) from exc


def read_npy(path: Path, opts: ReadOptions) -> list[Volume]:
    """Memory-map one ``.npy`` file as a Volume.

    Raises
    ------
    InputError
        Bad magic, object arrays, a header declaring more bytes than the file
        holds or than the limits allow.

    References
    ----------
    NEP 1 (the ``.npy`` format).
    """
    try:
        with open(path, "rb") as fh:
            shape, dtype, _fortran, offset = _read_npy_header(fh, path.stat().st_size)
    except (ValueError, OSError, SyntaxError, tokenize.TokenError) as exc:
        raise InputError("unreadable", f"{path.name} is not a valid .npy file: {one_line(exc)}",
                         str(path)) from exc
    _check_dtype(dtype, path)
    _check_shape(shape, path)
    nbytes = declared_bytes(shape, dtype.itemsize)
    check_array_bytes(nbytes, opts.limits, str(path), path.name)
    have = path.stat().st_size - offset
    if have < nbytes:
        raise InputError("truncated", f"{path.name}: the header declares shape {list(shape)} "
                         f"({nbytes} bytes) but the file holds only {have} bytes of data.",
                         str(path))
    # copy-on-write: analysers may modify the blocks they read; the file never changes
    arr = np.load(path, mmap_mode="c", allow_pickle=False)
    meta = _sidecar(path)
    domain = opts.domain or meta.get("domain") or "image"
    cax = opts.coil_axis if opts.coil_axis is not None else meta.get("coil_axis")
    return [_wrap(arr, path, "npy", domain, cax, path.stem, opts)]


def read_npz(path: Path, opts: ReadOptions) -> list[Volume]:
    """Read the chosen array of an ``.npz`` archive.

    The array is ``opts.dataset`` if given, else ``kspace`` (domain k-space) or
    ``image``, else the only or largest array.

    References
    ----------
    NEP 1; ``numpy.savez`` (a zip of ``.npy`` members).
    """
    try:
        zf = zipfile.ZipFile(path)
    except (zipfile.BadZipFile, OSError, NotImplementedError, ValueError, EOFError) as exc:
        raise InputError("unreadable", f"{path.name} is not a valid .npz archive: {one_line(exc)}",
                         str(path)) from exc
    headers: dict[str, tuple[tuple[int, ...], np.dtype]] = {}
    with zf:
        for info in zf.infolist():
            if not info.filename.endswith(".npy"):
                continue
            key = info.filename[:-4]
            # a member's expanded size counts against the array ceiling before any
            # byte of it is inflated (its header is at most 64 KiB: NEP 1, version 2)
            check_array_bytes(max(0, info.file_size - (1 << 16)), opts.limits, str(path),
                              f"{path.name}[{key}]")
            try:
                with zf.open(info) as fh:
                    shape, dtype, _f, _o = _read_npy_header(fh, info.file_size)
            except (ValueError, OSError, SyntaxError, zipfile.BadZipFile, zlib.error,
                    NotImplementedError, EOFError, tokenize.TokenError) as exc:
                raise InputError("unreadable", f"{path.name}[{key}] is not a valid array: "
                                 f"{one_line(exc)}", str(path)) from exc
            headers[key] = (shape, dtype)
    if not headers:
        raise InputError("empty", f"{path.name} holds no arrays.", str(path))
    key = _choose_key(headers, opts.dataset, path)
    shape, dtype = headers[key]
    _check_dtype(dtype, path)
    _check_shape(shape, path, key)
    check_array_bytes(declared_bytes(shape, dtype.itemsize), opts.limits,
                      str(path), f"{path.name}[{key}]")
    try:
        with np.load(path, allow_pickle=False) as npz:
            arr = npz[key]
    except (ValueError, OSError, zipfile.BadZipFile, EOFError, zlib.error,
            NotImplementedError) as exc:
        raise InputError("truncated", f"{path.name}[{key}] could not be read: {one_line(exc)}",
                         str(path)) from exc
    meta = _sidecar(path)
    lowered = key.lower().replace("-", "_")
    key_domain = "kspace" if lowered in ("kspace", "k_space") else (
        "image" if lowered in ("image", "images", "img") else None)
    domain = opts.domain or key_domain or meta.get("domain") or "image"
    cax = opts.coil_axis if opts.coil_axis is not None else meta.get("coil_axis")
    others = sorted(set(headers) - {key})
    if others:
        opts.warnings.append(f"{path.name}: analysed the array {key!r}; also present: "
                             f"{', '.join(others[:10])} (choose with --dataset).")
    vol = _wrap(arr, path, "npz", domain, cax, f"{path.stem}[{key}]", opts)
    vol.header.fields["array_key"] = key
    return [vol]


def _choose_key(headers: dict[str, tuple[tuple[int, ...], np.dtype]], wanted: str | None,
                path: Path) -> str:
    if wanted is not None:
        if wanted not in headers:
            raise InputError("no_such_dataset", f"{path.name} has no array {wanted!r}; it "
                             f"holds {', '.join(sorted(headers))}.", str(path))
        return wanted
    for k in _DOMAIN_KEYS:
        for key in headers:
            if key.lower().replace("-", "_") == k:
                return key

    def size(k: str) -> int:
        shape, dtype = headers[k]
        return declared_bytes(shape, dtype.itemsize) if len(shape) >= 2 else -1

    return max(headers, key=size)
