"""Options every reader receives (one object, so reader signatures stay small)."""

from __future__ import annotations

import contextlib
from dataclasses import dataclass, field

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


def check_array_bytes(n_bytes: int, limits: Limits, path: str, what: str) -> None:
    """Raise ``InputError("too_large")`` when a declared size exceeds the ceiling."""
    from app.errors import InputError

    if n_bytes > limits.max_array_bytes:
        raise InputError(
            "too_large",
            f"{what} declares {n_bytes / 1024**2:.1f} MiB of pixel data, more than the "
            f"limit of {limits.max_array_bytes / 1024**2:.1f} MiB "
            "(raise RAWPROOF_MAX_ARRAY_BYTES if this is expected).",
            path,
        )
