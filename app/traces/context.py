"""Per-Volume shared state: results computed once and reused by several analysers."""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from app.io.volume import Volume


def evenly_spaced(indices: Any, k: int) -> np.ndarray:
    """At most ``k`` evenly spaced entries of ``indices`` (the first and last included).

    Every stated frame subset (the context's, the background's, the JPEG and
    resampling tests', the previews) is chosen by this rule.
    """
    idx = np.asarray(indices, dtype=int)
    if idx.size <= k:
        return idx
    return idx[np.unique(np.linspace(0, idx.size - 1, k).round().astype(int))]


class SharedStepBusy(BaseException):
    """Raised by :meth:`AnalysisContext.cached` in a thread that must not wait.

    A ``BaseException``, so that analysers' own ``except Exception`` handlers let
    it through to the scheduler, which runs the analyser again later.
    """


_THREAD = threading.local()


def waiting_allowed(allowed: bool) -> None:
    """Whether ``cached`` in the calling thread waits for a step another thread computes."""
    _THREAD.no_wait = not allowed


@dataclass
class AnalysisContext:
    """What analysers share while one Volume is analysed.

    Attributes
    ----------
    volume : Volume
    workers : int
        Threads for ``scipy.fft`` (``workers=``).
    batch : int
        Frames per slice batch when streaming through the volume.
    max_frames : int or None
        Upper bound on frames analysed; when the volume has more, an evenly spaced
        subset is used and the report states it.
    options : dict
        Reader/CLI options (``domain``, ``coil_axis``, ``dataset``).
    notes : list of str
        Sentences added to the report's warnings (for example a stated subsampling).
    """

    volume: Volume
    workers: int = 2
    batch: int = 16
    max_frames: int | None = None
    options: dict[str, Any] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    _cache: dict[str, Any] = field(default_factory=dict, repr=False)
    _locks: dict[str, threading.Lock] = field(default_factory=dict, repr=False)
    _guard: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def cached(self, key: str, factory: Callable[[], Any]) -> Any:
        """Compute ``factory()`` once per Volume under ``key`` and reuse it.

        Safe when analysers run in threads: the first caller computes, later
        callers of the same key wait for its result. An exception raised by the
        factory is cached too and raised again, so a shared step that fails is
        not recomputed by every analyser.
        """
        if key not in self._cache:
            with self._guard:
                lock = self._locks.setdefault(key, threading.Lock())
            if not lock.acquire(blocking=not getattr(_THREAD, "no_wait", False)):
                raise SharedStepBusy(key)
            try:
                if key not in self._cache:
                    try:
                        value = (True, factory())
                    except Exception as exc:  # noqa: BLE001 - re-raised to each caller
                        value = (False, exc)
                    self._cache[key] = value
            finally:
                lock.release()
        ok, value = self._cache[key]
        if not ok:
            raise value
        return value

    @contextlib.contextmanager
    def waiting(self) -> Iterator[None]:
        """Within this block ``cached`` waits for a step another thread computes
        (for analysers that have done their own costly work and would lose it if
        run again later)."""
        before = getattr(_THREAD, "no_wait", False)
        _THREAD.no_wait = False
        try:
            yield
        finally:
            _THREAD.no_wait = before

    def note(self, text: str) -> None:
        """Add a sentence to the report's warnings once (thread-safe)."""
        with self._guard:
            if text not in self.notes:
                self.notes.append(text)

    def frame_indices(self) -> Any:
        """Flat frame indices to analyse (all, or an evenly spaced stated subset)."""
        n = self.volume.n_slices
        if self.max_frames is None or n <= self.max_frames:
            return np.arange(n)
        idx = evenly_spaced(np.arange(n), self.max_frames)
        self.note(f"analysed {len(idx)} of {n} frames, evenly spaced")
        return idx
