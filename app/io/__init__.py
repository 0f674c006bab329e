"""Readers: candidate files -> Volume.

Public surface: :func:`open_input` (a file, folder or zip -> groups of Volumes),
:class:`Volume`, :class:`Header`, :class:`Loaded`.
"""

from __future__ import annotations

import contextlib
import json
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from app.config import Limits
from app.errors import InputError
from app.io.volume import Header, Volume

__all__ = ["Header", "Loaded", "Volume", "open_input"]


@dataclass
class Loaded:
    """What :func:`open_input` yields: the Volumes of one input, one per group."""

    volumes: list[Volume]
    format: str
    n_files: int
    warnings: list[str] = field(default_factory=list)


@contextlib.contextmanager
def open_input(
    path: str | Path,
    *,
    domain: str | None = None,
    coil_axis: int | None = None,
    dataset: str | None = None,
    limits: Limits | None = None,
) -> Iterator[Loaded]:
    """Open a file, folder or zip archive as groups of Volumes.

    A context manager: temporary extractions (zip) live until it exits.

    Raises
    ------
    InputError
        For anything that cannot be read, with a code and a message a person can act on.
    """
    p = Path(path)
    if not p.exists():
        raise InputError("not_found", f"No such file or folder: {p}", str(p))
    if p.suffix.lower() == ".npy":
        arr = np.load(p, mmap_mode="r", allow_pickle=False)
        side = p.with_suffix(".json")
        meta = json.loads(side.read_text()) if side.exists() else {}
        dom = domain or meta.get("domain", "image")
        cax = coil_axis if coil_axis is not None else meta.get("coil_axis")
        vol = Volume.from_array(arr, domain=dom, coil_axis=cax, format="npy",
                                source_files=[str(p)], name=p.stem, header=Header())
        yield Loaded([vol], "npy", 1)
        return
    raise InputError("unsupported_format", f"rawproof cannot read {p.name} yet", str(p))
