"""PNG, JPEG and TIFF reader via Pillow: one file, a multi-page TIFF, or a stack.

Greyscale 8- and 16-bit images keep their stored values; colour images are
converted to luminance (ITU-R BT.601 weights, as Pillow's ``convert("L")``) with
a warning. JPEG files keep their quantisation tables (Pillow's
``Image.quantization``, natural row-major order) in ``jpeg_quant_tables``.

References
----------
ITU-T T.81 | ISO/IEC 10918-1 (JPEG); ISO/IEC 15948 (PNG); TIFF Revision 6.0;
ITU-R Recommendation BT.601 (luma weights 0.299, 0.587, 0.114).
"""

from __future__ import annotations

import io
import re
import warnings as _warnings
from pathlib import Path
from typing import Any

import numpy as np

from app.errors import InputError
from app.io.formats import RASTER_SUFFIXES
from app.io.options import ReadOptions, check_array_bytes, one_line
from app.io.volume import Header, Volume

__all__ = ["RASTER_SUFFIXES", "natural_key", "read_raster"]
_COLOUR = {"RGB", "RGBA", "P", "PA", "CMYK", "YCbCr", "LAB", "HSV", "RGBX", "LA", "La"}


def natural_key(path: Path) -> list[Any]:
    """Sort key putting ``img2`` before ``img10`` (digit runs compared as numbers)."""
    return [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", path.name)]


def _open(path: Path, opts: ReadOptions) -> Any:
    from PIL import Image, UnidentifiedImageError

    check_array_bytes(path.stat().st_size, opts.limits, str(path), path.name)
    try:
        with _warnings.catch_warnings():
            _warnings.simplefilter("error", Image.DecompressionBombWarning)
            # A forged chunk length (PNG IDAT of 512 MiB in a 1 kB file)
            # makes Pillow ask the file for that many bytes at once, which CPython
            # allocates first; a BytesIO returns only what is there.
            im = Image.open(io.BytesIO(path.read_bytes()))
    except (Image.DecompressionBombError, Image.DecompressionBombWarning) as exc:
        raise InputError("too_large", f"{path.name}: {one_line(exc)}", str(path)) from exc
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as exc:
        raise InputError("unreadable", f"{path.name} is not a readable image: {one_line(exc)}",
                         str(path)) from exc
    w, h = im.size
    if w * h > opts.limits.max_image_pixels:
        im.close()
        raise InputError("too_large", f"{path.name} declares {w} x {h} pixels, more than the "
                         f"limit of {opts.limits.max_image_pixels} pixels.", str(path))
    return im


def _frames(im: Any) -> list[Any]:
    from PIL import ImageSequence

    n = int(getattr(im, "n_frames", 1) or 1)
    return [f.copy() for f in ImageSequence.Iterator(im)] if n > 1 else [im]


def _to_array(frame: Any, path: Path, colour_note: list[str]) -> tuple[np.ndarray, int]:
    mode = frame.mode
    try:
        if mode in _COLOUR:
            colour_note.append(mode)
            if mode in ("LA", "La"):
                arr = np.asarray(frame.getchannel(0))
            else:
                arr = np.asarray(frame.convert("RGB").convert("L"))
            return arr, 8
        if mode == "1":
            return np.asarray(frame.convert("L")), 1
        arr = np.asarray(frame)
    except (OSError, SyntaxError, ValueError) as exc:
        raise InputError("truncated", f"{path.name}: the pixels could not be decoded "
                         f"(damaged or truncated file): {one_line(exc)}", str(path)) from exc
    if arr.ndim != 2:
        raise InputError("unsupported_format", f"{path.name}: image mode {mode} with shape "
                         f"{arr.shape} is not supported.", str(path))
    bits = {"L": 8, "I;16": 16, "I;16B": 16, "I;16L": 16, "I;16N": 16, "I": 32, "F": 32}
    return arr, bits.get(mode, arr.dtype.itemsize * 8)


def _fields(im: Any, fmt: str, bits: int, mode: str) -> dict[str, Any]:
    f: dict[str, Any] = {"bit_depth": bits, "image_mode": mode}
    if fmt == "jpeg":
        q = getattr(im, "quantization", None) or {}
        f["jpeg_quant_tables"] = [[int(v) for v in q[k]] for k in sorted(q)]
        f["lossy_compression"] = True
        f["lossy_method"] = "ISO_10918_1"
        info = getattr(im, "info", {}) or {}
        if info.get("progressive") or info.get("progression"):
            f["jpeg_process"] = "progressive"
    elif fmt == "tiff":
        comp = (getattr(im, "info", {}) or {}).get("compression")
        if comp:
            f["tiff_compression"] = str(comp)
            if str(comp).lower() in ("jpeg", "tiff_jpeg", "webp"):
                f["lossy_compression"] = True
    return f


def _read_file(path: Path, opts: ReadOptions) -> tuple[np.ndarray, dict[str, Any], list[str]]:
    im = _open(path, opts)
    fmt = RASTER_SUFFIXES[path.suffix.lower()]
    colour: list[str] = []
    with im:
        try:
            frames = _frames(im)
            arrays = []
            bits = 8
            for fr in frames:
                arr, bits = _to_array(fr, path, colour)
                arrays.append(arr)
        except (OSError, SyntaxError, ValueError, EOFError) as exc:
            if isinstance(exc, InputError):
                raise
            raise InputError("truncated", f"{path.name}: the pixels could not be decoded "
                             f"(damaged or truncated file): {one_line(exc)}", str(path)) from exc
        fields = _fields(im, fmt, bits, im.mode)
    shapes = {a.shape for a in arrays}
    if len(shapes) != 1:
        raise InputError("inconsistent_stack", f"{path.name}: its pages differ in size "
                         f"({sorted(shapes)}).", str(path))
    data = arrays[0] if len(arrays) == 1 else np.stack(arrays)
    return data, fields, colour


def read_raster(paths: list[Path], opts: ReadOptions, *, name: str | None = None) -> list[Volume]:
    """Read one image file or a stack of same-sized images into one Volume.

    Parameters
    ----------
    paths : list of Path
        Sorted here in natural filename order (``img2`` before ``img10``).
    opts : ReadOptions
    name : str, optional
        Group label (default: the file stem, or the folder name for a stack).

    Returns
    -------
    list of Volume

    Raises
    ------
    InputError
        Unreadable or truncated files, Pillow's decompression-bomb guard, more
        pixels than the limits allow, or images of different sizes in one stack.
    """
    paths = sorted(paths, key=natural_key)
    fields: dict[str, Any] = {}
    colours: set[str] = set()
    stack: np.ndarray | None = None
    mixed = False
    for k, p in enumerate(paths):
        data, f, colour = _read_file(p, opts)
        colours.update(colour)
        if k == 0:
            fields = f
            check_array_bytes(data.nbytes * len(paths), opts.limits, str(p), "This image stack")
            if len(paths) == 1:
                stack = data
                break
            stack = np.empty((len(paths),) + data.shape, dtype=data.dtype)
        elif data.shape != stack.shape[1:]:
            raise InputError("inconsistent_stack", f"{p.name} is {data.shape[-1]} x "
                             f"{data.shape[-2]} pixels but {paths[0].name} is "
                             f"{stack.shape[-1]} x {stack.shape[-2]}; a stack needs "
                             "images of one size.", str(p))
        elif f.get("jpeg_quant_tables") and f["jpeg_quant_tables"] != fields.get(
                "jpeg_quant_tables"):
            fields.setdefault("jpeg_quant_tables_vary", True)
        if data.dtype != stack.dtype:
            mixed = True
            wider = np.result_type(stack.dtype, data.dtype)
            if wider != stack.dtype:
                stack = stack.astype(wider)
        stack[k] = data
    assert stack is not None
    data = stack
    fmt = RASTER_SUFFIXES[paths[0].suffix.lower()]
    if mixed:
        opts.warnings.append(f"{name or paths[0].parent.name}: images of different bit "
                             "depths were stacked.")
    label = name or (paths[0].stem if len(paths) == 1 else paths[0].parent.name)
    if colours:
        opts.warnings.append(f"{label}: colour images ({', '.join(sorted(colours))}) were "
                             "converted to luminance (ITU-R BT.601 weights).")
    fields["n_files"] = len(paths)
    return [Volume.from_array(data, domain=opts.domain or "image", format=fmt,
                              source_files=[str(p) for p in paths], name=label,
                              header=Header(fields=fields))]
