"""Check one (possibly hostile) input against the readers' rule.

The rule: :func:`app.io.open_input` either yields Volumes whose every frame
can be read through :meth:`Volume.iter_slices`, or raises
:class:`app.errors.InputError` with a non-empty one-line message. Memory: the
Python-heap peak (``tracemalloc``, which numpy reports its buffers to) stays
under a bound derived from the small :class:`Limits` used here, so a declared
size is refused before it is allocated. Anything else is a finding.
"""

from __future__ import annotations

import tempfile
import tracemalloc
import warnings
from dataclasses import dataclass
from pathlib import Path

from app.config import Limits
from app.errors import InputError

#: Small ceilings for fuzzing: a lie about sizes must hit these, not the machine.
FUZZ_LIMITS = Limits(max_array_bytes=16 << 20, max_zip_members=50,
                     max_zip_total_bytes=32 << 20, max_zip_member_bytes=16 << 20,
                     max_zip_ratio=200.0, max_files=200, max_image_pixels=4 << 20)
#: Stored values, one float32/complex64 batch and reader overheads.
MEMORY_BOUND = 4 * FUZZ_LIMITS.max_array_bytes + (32 << 20)


@dataclass
class Outcome:
    """What one input did: ``"volumes"`` or ``"input_error"`` (with its code)."""

    kind: str
    code: str = ""
    peak_bytes: int = 0


class FindingError(AssertionError):
    """An input that broke the rule (an unexpected exception or the memory bound)."""


def check_input(data: bytes, suffix: str, *, limits: Limits = FUZZ_LIMITS,
                memory_bound: int = MEMORY_BOUND) -> Outcome:
    """Write ``data`` to a file with ``suffix``, open it, read every frame.

    Raises
    ------
    FindingError
        When anything but InputError escapes, the message is empty or spans
        several lines, or the heap peak exceeds ``memory_bound``.
    """
    from app.io import open_input

    with tempfile.TemporaryDirectory(prefix="rawproof-fuzz-") as tmp:
        path = Path(tmp) / f"input{suffix}"
        path.write_bytes(data)
        tracing = tracemalloc.is_tracing()
        if not tracing:
            tracemalloc.start()
        tracemalloc.reset_peak()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # libraries' complaints about damaged fields
                with open_input(path, limits=limits) as loaded:
                    n = 0
                    for vol in loaded.volumes:
                        for _idx, block in vol.iter_slices(16):
                            n += block.shape[0]
                    outcome = Outcome("volumes", str(n))
        except InputError as exc:
            if not exc.message or "\n" in exc.message or not exc.code:
                raise FindingError(f"InputError without a one-line message: {exc.to_dict()}"
                                   ) from exc
            outcome = Outcome("input_error", exc.code)
        except Exception as exc:  # noqa: BLE001 - that is the finding
            raise FindingError(f"{type(exc).__name__} escaped the readers: {exc}") from exc
        finally:
            peak = tracemalloc.get_traced_memory()[1]
            if not tracing:
                tracemalloc.stop()
    outcome.peak_bytes = peak
    if peak > memory_bound:
        raise FindingError(f"heap peak {peak / 2**20:.1f} MiB over the bound "
                      f"{memory_bound / 2**20:.1f} MiB ({outcome.kind} {outcome.code})")
    return outcome


def check_pipeline(data: bytes, suffix: str, *, limits: Limits = FUZZ_LIMITS) -> list[str]:
    """Run the whole headless analysis (:func:`app.analysis.analyse_path`) on one
    input; return the analysers that failed on it (their summary says so).

    The report catches an analyser's exception and says it failed; for a readable
    input that is still a finding (a crash on a 1 x N image, say).

    Raises
    ------
    FindingError
        When anything but InputError escapes the pipeline.
    """
    from app.analysis import analyse_path

    with tempfile.TemporaryDirectory(prefix="rawproof-fuzz-") as tmp:
        path = Path(tmp) / f"input{suffix}"
        path.write_bytes(data)
        try:
            report = analyse_path(str(path), workers=1, limits=limits)
        except InputError:
            return []
        except Exception as exc:  # noqa: BLE001 - that is the finding
            raise FindingError(f"{type(exc).__name__} escaped the analysis: {exc}") from exc
    failed = []
    for group in report.get("groups") or [report]:
        for tid, t in (group.get("traces") or {}).items():
            if "analyser failed" in str(t.get("summary", "")):
                failed.append(f"{tid}: {t['summary']}")
    return failed
