"""What every step of one analysis shares: the frames it reads and the notes it adds.

The analysis plan (:mod:`app.traces.plan`) builds one :class:`Scope` and one
:class:`Notes` per Volume and hands them to the shared steps and analysers that
name ``scope`` or ``notes`` in their signature.
"""

from __future__ import annotations

import threading
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np


def evenly_spaced(indices: Any, k: int) -> np.ndarray:
    """At most ``k`` evenly spaced entries of ``indices`` (the first and last included).

    Every stated frame subset (the scope's, the background's, the JPEG and
    resampling tests', the previews) is chosen by this rule.
    """
    idx = np.asarray(indices, dtype=int)
    if idx.size <= k:
        return idx
    return idx[np.unique(np.linspace(0, idx.size - 1, k).round().astype(int))]


class Notes:
    """Sentences added to the report's warnings, each once (thread-safe)."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._items: list[str] = []

    def add(self, text: str) -> None:
        """Add ``text`` unless it is there already."""
        with self._lock:
            if text not in self._items:
                self._items.append(text)

    def sorted(self) -> list[str]:
        """The notes in a fixed order (steps run in threads add them in any order)."""
        with self._lock:
            return sorted(self._items)


@dataclass(frozen=True)
class Scope:
    """How one Volume is read by every step.

    Attributes
    ----------
    frames : ndarray
        Flat frame indices to analyse: all, or an evenly spaced stated subset.
    batch : int
        Frames per slice batch when streaming through the volume.
    workers : int
        Threads for ``scipy.fft`` (``workers=``) and for the plan's steps.
    options : Mapping
        Reader and CLI options (``domain``, ``coil_axis``, ``dataset``,
        ``pixels_decoded``).
    """

    frames: np.ndarray
    batch: int = 16
    workers: int = 2
    options: Mapping[str, Any] = field(default_factory=dict)

    @classmethod
    def of(cls, n_frames: int, *, max_frames: int | None = None, batch: int = 16,
           workers: int = 2, options: Mapping[str, Any] | None = None,
           notes: Notes | None = None) -> Scope:
        """The scope of a Volume of ``n_frames`` frames, at most ``max_frames`` of them.

        A subset is stated in ``notes``.
        """
        idx = np.arange(n_frames)
        if max_frames is not None and n_frames > max_frames:
            idx = evenly_spaced(idx, max_frames)
            if notes is not None:
                notes.add(f"analysed {len(idx)} of {n_frames} frames, evenly spaced")
        return cls(idx, batch, max(1, int(workers)), dict(options or {}))
