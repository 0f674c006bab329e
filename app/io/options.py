"""Options every reader receives (one object, so reader signatures stay small)."""

from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass, field
from typing import Any

from app.config import Limits


@dataclass
class ReadOptions:
    """What the caller of :func:`app.io.open_input` asked for.

    Attributes
    ----------
    domain : {"image", "kspace"} or None
        Overrides whatever the file or its sidecar says.
    coil_axis : int or None
        Axis of a multi-coil array that indexes receive channels.
    dataset : str or None
        HDF5 dataset key (or npz key).
    limits : Limits
        Size ceilings checked before anything is allocated.
    stack : contextlib.ExitStack
        Files that must stay open while the Volumes are used (HDF5).
    warnings : list of str
        Sentences for the report's ``warnings``.
    """

    domain: str | None = None
    coil_axis: int | None = None
    dataset: str | None = None
    limits: Limits = field(default_factory=Limits)
    stack: contextlib.ExitStack = field(default_factory=contextlib.ExitStack)
    warnings: list[str] = field(default_factory=list)


def declared_bytes(shape: Any, itemsize: int) -> int:
    """Bytes an array of ``shape`` needs, in exact integer arithmetic.

    A product in int64 (``np.prod``) wraps around for absurd declared shapes and
    can come out small or negative; Python integers do not. Negative sizes give -1.
    """
    dims = [int(s) for s in shape]
    if any(d < 0 for d in dims):
        return -1
    return math.prod(dims) * int(itemsize)


def check_array_bytes(n_bytes: int, limits: Limits, path: str, what: str) -> None:
    """Raise ``InputError("too_large")`` when a declared size exceeds the ceiling."""
    from app.errors import InputError

    if n_bytes < 0:
        raise InputError("bad_header", f"{what} declares a negative array size.", path)
    if n_bytes > limits.max_array_bytes:
        raise InputError(
            "too_large",
            f"{what} declares {n_bytes / 1024**2:.1f} MiB of pixel data, more than the "
            f"limit of {limits.max_array_bytes / 1024**2:.1f} MiB "
            "(raise RAWPROOF_MAX_ARRAY_BYTES if this is expected).",
            path,
        )


def array_axes(ndim: int, coil_axis: int | None) -> tuple[str, ...]:
    """Axis names of a plain array: ``coils`` where said, the other leading axes
    ``slices`` (nearest the image), then ``time``, then ``frames``.

    Raises
    ------
    ValueError
        When the coil axis is out of range or one of the two image axes.
    """
    if ndim < 2:
        raise ValueError("an image needs at least two dimensions")
    cax = None
    if coil_axis is not None:
        if not -ndim <= coil_axis < ndim:
            raise ValueError(f"coil axis {coil_axis} is out of range for {ndim} dimensions")
        cax = coil_axis % ndim
        if cax >= ndim - 2:
            raise ValueError("the coil axis cannot be one of the last two (image) axes")
    lead = [k for k in range(ndim - 2) if k != cax]
    names = (["frames"] * max(0, len(lead) - 2) + ["time", "slices"])[-len(lead):] if lead else []
    axes = ["rows", "cols"]
    out: list[str] = []
    it = iter(names)
    for k in range(ndim - 2):
        out.append("coils" if k == cax else next(it))
    return tuple(out + axes)


def one_line(exc: BaseException, limit: int = 300) -> str:
    """An exception's text on one line (libraries report over several), shortened."""
    text = " ".join(str(exc).split())
    return text if len(text) <= limit else text[: limit - 3] + "..."


def is_complex_pairs(shape: tuple[int, ...], dtype: Any) -> bool:
    """True for a real float array whose last axis (size 2) holds real and imaginary
    parts, as several k-space collections store complex data; an image of two
    columns is not a plausible reading of such an array."""
    import numpy as np

    dt = np.dtype(dtype)
    return dt.kind == "f" and len(shape) >= 3 and shape[-1] == 2 and shape[-2] > 2
